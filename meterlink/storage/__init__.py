"""Storage: SQLite schema and migrations, the Store, span index, salvage, the recorder and the recording loader."""
