"""Stage 1, ingest: read the dated archive, tokenize it and cut it into slices (run folder: slices/,
summary, counts, documents, composition)."""
