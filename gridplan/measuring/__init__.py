"""The measuring side: config -> spec -> data and folds -> runner -> store (one SQLite file per run)."""
