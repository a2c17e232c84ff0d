"""Storage: tables, repository functions, the sample codec, database set-up and retention."""
