"""The scored-image log (SQLite, append-only): `store.py` the database, `records.py` what is done with its rows."""
from oddling.logbook.store import (LOG_SUFFIX, SCHEMA_VERSION, LogRow, ScoreLog, bank_fingerprint,  # noqa: F401
                                   default_log_path, open_log, parse_time)
