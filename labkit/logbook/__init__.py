"""The logbook: the durable, append-only record of lab sessions (see ``docs/logbook.md``).

- :mod:`~labkit.logbook.schema`: the tables' columns and dtypes; :mod:`~labkit.logbook.storage`: the interface
- :mod:`~labkit.logbook.sqlite`: the archive in one SQLite file (:class:`~labkit.logbook.sqlite.SQLiteArchive`)
- :mod:`~labkit.logbook.handin`: hand-in files and merging them; :mod:`~labkit.logbook.migrations`: format versions
- :mod:`~labkit.logbook.exchange`: CSV/Parquet/XLSX export and import; :mod:`~labkit.logbook.snapshots`: review
  snapshots and :func:`~labkit.logbook.snapshots.load_readings`

Importing this package loads nothing else: the writing path needs only :mod:`sqlite3`.
"""
