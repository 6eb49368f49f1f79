"""The store: database URL, engine, tables and bulk frame I/O."""
