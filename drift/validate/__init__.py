"""Checks of the method itself: planted changes in a real archive, and a ranking judged against
gold values."""
