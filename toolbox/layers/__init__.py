"""Layer I/O: the only package that talks to OGR (through pyogrio, or fiona when asked).

``read`` turns a vector layer into point coordinates plus the attribute columns a script needs;
``write`` puts a result table or layer on disk without ever leaving a half-written file or
touching layers that were already there.
"""

from .read import ENGINES, PointLayer, points_of, read_layer, read_points
from .write import LAYER_FORMATS, TABLE_FORMATS, check_output, output_format, shapefile_names, write_output

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
]
