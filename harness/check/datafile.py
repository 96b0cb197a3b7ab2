"""Reading observations from a CSV or Parquet file (``harness.infra.data_files``).

The reader lives in the lowest layer, where the case files and the audit reach it too;
this module keeps the ``check`` stage's import path.
"""

from harness.infra.data_files import (
    OTHER_SEPARATORS,
    CsvDialect,
    DataFileError,
    Observations,
    load_observations,
    observations_from_arrays,
    read_table,
    sniff_dialect,
)

__all__ = [
    "OTHER_SEPARATORS",
    "CsvDialect",
    "DataFileError",
    "Observations",
    "load_observations",
    "observations_from_arrays",
    "read_table",
    "sniff_dialect",
]
