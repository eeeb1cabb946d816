"""Layer I/O: the only package that talks to OGR (through pyogrio, or fiona when asked) and
reads GeoParquet and Arrow (through pyarrow).

``read`` turns a vector layer into point coordinates plus the attribute columns a script needs;
``parquet`` reads GeoParquet files, folders and globs, whole or in record batches, and layers
held as Arrow tables; ``where`` turns a SQL ``WHERE`` text into an Arrow filter for them;
``pipe`` reads a layer from standard input and writes to standard output;
``write`` puts a result table or layer on disk without ever leaving a half-written file or
touching layers that were already there.
"""

from .batched import FrameBatches
from .read import ENGINES, PointLayer, points_of, read_layer, read_points
from .write import (
    LAYER_FORMATS,
    TABLE_FORMATS,
    check_output,
    output_format,
    provenance,
    shapefile_names,
    write_output,
)

__all__ = [
    "ENGINES",
    "TABLE_FORMATS",
    "LAYER_FORMATS",
    "PointLayer",
    "read_points",
    "read_layer",
    "points_of",
    "check_output",
    "output_format",
    "shapefile_names",
    "write_output",
    "FrameBatches",
    "ArrowLayer",
    "arrow_layer",
    "is_parquet",
    "open_parquet",
    "points_of_table",
    "parse_where",
    "filter_frame",
    "read_stdin",
    "layer_from_bytes",
    "provenance",
]

# pyarrow.dataset takes a while to import: load the Arrow readers on first use only
_LAZY = {
    "ArrowLayer": "parquet",
    "arrow_layer": "parquet",
    "is_parquet": "parquet",
    "open_parquet": "parquet",
    "points_of_table": "parquet",
    "parse_where": "where",
    "filter_frame": "where",
    "read_stdin": "pipe",
    "layer_from_bytes": "pipe",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
