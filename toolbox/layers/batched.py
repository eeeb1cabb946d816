"""A result layer made batch by batch, and writing it without holding it whole.

A per-feature result of a layer larger than memory is as large as the layer, so a script
returns a :class:`FrameBatches` (how to make the result's batches, and their columns) instead of
one frame. :func:`toolbox.layers.write.write_output` writes it batch after batch into the same
temporary file it writes a frame to, and renames that into place only when every batch is
written: a failure in any batch leaves nothing behind. Without an output path the batches are
put together in memory (:meth:`FrameBatches.frame`).
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import pyogrio

__all__ = ["FrameBatches", "write_batches"]


@dataclass(frozen=True)
class FrameBatches:
    """A result layer as batches: ``make()`` yields GeoDataFrames with ``columns`` (the last
    being the geometry ``geometry_name``), each time it is called."""

    make: Callable[[], Iterator]
    columns: list[str]
    geometry_name: str
    crs: object
    attrs: dict = field(default_factory=dict)  # as a frame's: the notes the runner reports

    def frame(self):
        """Every batch put together (the whole result in memory)."""
        import geopandas

        parts = list(self.make())
        if parts:
            whole = pd.concat(parts, ignore_index=True)
        else:
            whole = geopandas.GeoDataFrame(
                {c: [] for c in self.columns if c != self.geometry_name},
                geometry=geopandas.GeoSeries([], crs=self.crs, name=self.geometry_name),
            )
        whole.attrs.update(self.attrs)
        return whole


def _parquet_writer(first, tmp: Path, record_text: str | None, provenance_key: str):
    """A ParquetWriter with the GeoParquet metadata geopandas writes for ``first`` (its bounding
    box left out, since it would be the first batch's only) and the provenance record."""
    import io

    import pyarrow.parquet as pq

    buffer = io.BytesIO()
    first.iloc[:0].to_parquet(buffer, index=False)
    schema = pq.read_schema(io.BytesIO(buffer.getvalue()))
    metadata = dict(schema.metadata or {})
    geo = json.loads(metadata[b"geo"])
    for column in geo.get("columns", {}).values():
        column.pop("bbox", None)
    metadata[b"geo"] = json.dumps(geo).encode()
    if record_text is not None:
        metadata[provenance_key.encode()] = record_text.encode()
    schema = schema.with_metadata(metadata)
    return pq.ParquetWriter(tmp, schema), schema


def _parquet_table(frame, schema):
    import io

    import pyarrow.parquet as pq

    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    return pq.read_table(io.BytesIO(buffer.getvalue())).cast(schema)


def write_batches(
    result: FrameBatches, tmp: Path, kind: str, *, layer_name: str, options: dict, renamed: dict,
    record_text: str | None, provenance_key: str,
) -> int:  # fmt: skip
    """Write every batch of ``result`` into ``tmp`` (a new file, or a copy of a GeoPackage) as
    ``kind`` (a layer format: gpkg, parquet, geojson, shp); returns the rows written. ``options`` go with the first batch (layer creation),
    ``renamed`` renames fields (Shapefile)."""
    rows, writer, schema = 0, None, None
    try:
        for frame in result.make():
            if len(frame) == 0:
                continue
            first = rows == 0
            if kind == "parquet":
                if writer is None:
                    writer, schema = _parquet_writer(frame, tmp, record_text, provenance_key)
                writer.write_table(_parquet_table(frame, schema))
            else:
                driver = {"gpkg": "GPKG", "geojson": "GeoJSON"}.get(kind, "ESRI Shapefile")
                extra = dict(layer=layer_name) if kind == "gpkg" else {}
                if kind == "shp":
                    extra["encoding"] = "UTF-8"
                pyogrio.write_dataframe(
                    frame.rename(columns=renamed), tmp, driver=driver, append=not first,
                    **extra, **(options if first else {}),
                )  # fmt: skip
            rows += len(frame)
    finally:
        if writer is not None:
            writer.close()
    if rows == 0:  # no feature: an empty result of the same columns
        empty = result.frame()
        if kind == "parquet":
            empty.to_parquet(tmp, index=False)
        else:
            pyogrio.write_dataframe(empty, tmp, **(dict(layer=layer_name) if kind == "gpkg" else {}), **options)
    return rows
