"""Data in: .npy (memory-mapped), .npz and CSV files, column checks and standardisation.

Nothing here reads a large design matrix into memory whole: ``.npy`` files are memory-mapped,
``.csv`` files are parsed in chunks straight into a memory-mapped cache beside them, and every
pass over the columns goes block by block.
"""

from ._columns import Standardization, check_columns, column_stats, standardize_columns
from ._csv import csv_header, read_csv
from ._dataset import Dataset, load_data
from ._sources import ARRAY_SUFFIXES, TABLE_SUFFIX, DataSource, load_array

__all__ = ["ARRAY_SUFFIXES", "TABLE_SUFFIX", "DataSource", "Dataset", "Standardization",
           "check_columns", "column_stats", "csv_header", "load_array", "load_data", "read_csv",
           "standardize_columns"]
