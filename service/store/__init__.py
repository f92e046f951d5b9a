"""Storage: database, schema and migrations, and the registry of studies, nights, versions, tokens and audit.

Functions here return frozen snapshots; ORM rows stay inside this package.
"""

