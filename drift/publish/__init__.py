"""Stage 4, publish: example sentences, word pages and the report (run folder: charts/)."""
