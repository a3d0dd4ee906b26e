from drift.cli import main

main()
