"""Stage 2, embed: train one word2vec model per slice and seed, locally or on Dask (run folder:
models/)."""
