"""The extract stage: the tables opened in place as DuckDB views (:mod:`.tables`) and the checks
of CONTRACTS §2 with file hashes (:mod:`.check`)."""

from emulant.extract.check import check_extract, sha256_file
from emulant.extract.tables import (
    Extract,
    ExtractError,
    connect,
    find_tables,
    open_extract,
    raw_relation,
)

__all__ = ["Extract", "ExtractError", "check_extract", "connect", "find_tables", "open_extract",
           "raw_relation", "sha256_file"]
