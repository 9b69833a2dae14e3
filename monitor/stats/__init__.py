"""Pure maths: numpy arrays in, numpy arrays out; no DuckDB, no store, no I/O."""
