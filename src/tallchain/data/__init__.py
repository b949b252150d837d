"""Data in: .npy (memory-mapped), .npz, Parquet and CSV files, tables in memory, formulas.

Nothing here reads a large design matrix into memory whole: ``.npy`` files are memory-mapped,
tables are read in batches of rows and encoded (by a formula or named columns) straight into
a memory-mapped cache in one documented folder, and every pass over the columns goes block by
block.
"""

from ._cache import CACHE_FOLDER, cache_folder
from ._columns import Standardization, check_columns, column_stats, standardize_columns
from ._dataset import Dataset, load_data
from ._encoding import Encoding
from ._load_table import MISSING_CHOICES, TableData, load_table
from ._new_rows import encode_new_rows, iter_new_rows, read_encoding
from ._sources import ARRAY_SUFFIXES, DataSource, load_array
from ._sources import TABLE_SUFFIXES
from ._sparse import (SPARSE_MAX_DENSITY, CSRArrays, CSRDesign, design_blocks, is_csr_design,
                      is_sparse_matrix)
from ._tables import csv_header, is_table_object, table_column_names, table_matrix

__all__ = ["ARRAY_SUFFIXES", "CACHE_FOLDER", "MISSING_CHOICES", "SPARSE_MAX_DENSITY",
           "TABLE_SUFFIXES", "CSRArrays", "cache_folder", "CSRDesign", "DataSource", "design_blocks",
           "is_csr_design",
           "is_sparse_matrix",
           "Dataset", "Encoding", "Standardization", "TableData", "check_columns",
           "column_stats", "csv_header", "encode_new_rows", "is_table_object",
           "iter_new_rows", "load_array", "load_data", "load_table", "read_encoding",
           "standardize_columns", "table_column_names", "table_matrix"]
