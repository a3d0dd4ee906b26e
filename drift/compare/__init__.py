"""Stage 3, compare: align the slices, measure each word's change, calibrate it against the
control and the pair's own words, find when it happened (run folder: scores, timeline, terms,
neighbours)."""
