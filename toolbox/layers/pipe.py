"""Standard input and output: a layer piped in, a table or layer piped out.

``-`` as the input reads a whole layer from standard input: GeoJSON, GeoParquet or an Arrow
IPC stream (or file), told apart by their first bytes unless the caller names the format.
``-`` as the output writes CSV, GeoJSON or GeoParquet to standard output; the bytes are made in
memory first, so a failure writes nothing rather than half a file.
"""

from __future__ import annotations

import io
import sys
from typing import BinaryIO

import pandas as pd
import pyarrow as pa

from ..errors import InputError, OutputError, ParameterError, param_noun, spell
from ..tables import csv_text
from .parquet import ArrowLayer, arrow_layer
from .read import _first_line, _is_frame

__all__ = ["INPUT_FORMATS", "STDOUT_FORMATS", "detect_format", "read_stdin", "layer_from_bytes", "to_bytes"]

#: formats a layer may arrive in on standard input
INPUT_FORMATS = ("geojson", "geoparquet", "arrow")
#: formats a table or layer may leave in on standard output
STDOUT_FORMATS = ("csv", "geojson", "geoparquet")
_LABEL = "the layer on standard input"


def detect_format(raw: bytes) -> str | None:
    """The format of a layer's bytes from how they begin, or None if they are not recognised.

    Examples
    --------
    >>> detect_format(b'{"type": "FeatureCollection", "features": []}'), detect_format(b"PAR1...")
    ('geojson', 'geoparquet')
    """
    if raw[:4] == b"PAR1":
        return "geoparquet"
    if raw[:4] == b"\xff\xff\xff\xff" or raw[:6] == b"ARROW1":
        return "arrow"
    text = raw[:64].lstrip(b"\xef\xbb\xbf \t\r\n")
    if text[:1] in (b"{", b"\x1e"):
        return "geojson"
    return None


def layer_from_bytes(raw: bytes, input_format: str | None = None, label: str = _LABEL) -> ArrowLayer:
    """A layer held in memory from the bytes of a GeoJSON, GeoParquet or Arrow IPC file.

    Examples
    --------
    >>> text = b'{"type": "FeatureCollection", "features": [{"type": "Feature", "properties": {"n": 1},'
    >>> text += b' "geometry": {"type": "Point", "coordinates": [3.0, 4.0]}}]}'
    >>> points = layer_from_bytes(text).points(["n"])
    >>> float(points.x[0]), float(points.y[0]), points.crs.to_string()
    (3.0, 4.0, 'EPSG:4326')
    """
    if input_format is not None and input_format not in INPUT_FORMATS:
        raise ParameterError(
            f"The input format must be one of {', '.join(INPUT_FORMATS)}. Got {input_format!r} instead."
        )
    if not raw.strip():
        raise InputError(
            f"Nothing arrived on standard input for {label}; pipe a layer in "
            "(GeoJSON, GeoParquet or an Arrow IPC stream) or give a path."
        )
    kind = input_format or detect_format(raw)
    if kind is None and raw.startswith(b"SQLite format 3\x00"):
        raise InputError(
            f"{label} is a GeoPackage (an SQLite database), which cannot be read from a pipe; give "
            "its path instead, or pipe GeoJSON, GeoParquet or an Arrow IPC stream."
        )
    if kind is None:
        raise InputError(
            f"Cannot tell the format of {label} (it begins with {raw[:12]!r}); pass "
            f"{spell('input_format', '|'.join(INPUT_FORMATS))}."
        )
    try:
        if kind == "geoparquet":
            import pyarrow.parquet as pq

            table = pq.read_table(pa.BufferReader(raw))
        elif kind == "arrow":
            reader = pa.ipc.open_file if raw[:6] == b"ARROW1" else pa.ipc.open_stream
            table = reader(pa.BufferReader(raw)).read_all()
        else:
            import pyogrio

            meta, table = pyogrio.read_arrow(io.BytesIO(raw))
            name = meta["geometry_name"] or "wkb_geometry"
            # GeoJSON has no geometry column name of its own: call it what geopandas does
            names = [
                "geometry" if n == name and "geometry" not in table.column_names else n
                for n in table.column_names
            ]
            table = table.rename_columns(names)
    except Exception as exc:  # each reader has its own error classes; all mean "not that format"
        raise InputError(
            f"Cannot read {label} as {kind}: {_first_line(exc)}; check what is piped in"
            f"{'' if input_format else ' or pass ' + spell('input_format')}."
        ) from exc
    return arrow_layer(table, label)


def read_stdin(input_format: str | None = None, stream: BinaryIO | None = None) -> ArrowLayer:
    """Read a whole layer from standard input (or ``stream``) into memory."""
    if stream is None:
        if sys.stdin is None or sys.stdin.isatty():
            raise InputError(
                "The input is '-' but nothing is piped in (standard input is a terminal); "
                "pipe a layer in, e.g. `cat homes.geojson | pairspread ... -`, or give a path."
            )
        stream = sys.stdin.buffer
    return layer_from_bytes(stream.read(), input_format)


def to_bytes(frame: pd.DataFrame, output_format: str, layer_name: str = "") -> bytes:
    """A table or layer as the bytes of a CSV, GeoJSON or GeoParquet file.

    A table without geometry becomes GeoJSON features without geometry, or plain Parquet; a
    layer as CSV carries its geometry as WKT in its geometry column.
    """
    if output_format not in STDOUT_FORMATS:
        raise ParameterError(
            f"The {param_noun('output_format')} must be one of {', '.join(STDOUT_FORMATS)}. "
            f"Got {output_format!r} instead."
        )
    buffer = io.BytesIO()
    if output_format == "csv":  # a null and an empty text written apart (toolbox.tables)
        buffer.write(csv_text(frame).encode("utf-8"))
    elif output_format == "geojson":
        import pyogrio

        pyogrio.write_dataframe(frame, buffer, driver="GeoJSON", layer=layer_name or None)
    elif _is_frame(frame):
        frame.to_parquet(buffer, index=False)
    else:
        pd.DataFrame(frame).to_parquet(buffer, index=False)
    return buffer.getvalue()


def write_stdout(frame: pd.DataFrame, output_format: str, layer_name: str = "") -> None:
    """Write a table or layer to standard output in one piece."""
    raw = to_bytes(frame, output_format, layer_name)
    try:
        sys.stdout.flush()
        sys.stdout.buffer.write(raw)
        sys.stdout.buffer.flush()
    except AttributeError as exc:  # a stdout without bytes (replaced by a test or a notebook)
        if output_format != "csv":
            raise OutputError(
                f"Standard output here takes text only; write {output_format} to a file instead."
            ) from exc
        sys.stdout.write(raw.decode("utf-8"))
        sys.stdout.flush()
