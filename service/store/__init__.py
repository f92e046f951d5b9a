"""Storage: the database, its schema and migrations, and the registry of studies, nights, model versions,
tokens and audit entries. Functions here return frozen snapshots; ORM rows stay inside this package."""
