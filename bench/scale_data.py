"""The benchmark dataset of ``bench_scale.py``: a large GeoParquet dataset, written once in chunks.

An invented scenario: every address point of the (fictional) mainland facing the Isle of
Quenwick, ``groups`` postal districts of very different sizes (log-normal), each a few
settlements (Gaussian clusters of 150 m to 4 km) plus a thin scatter over its area, with a
``residents`` weight of 1 to 6. Coordinates are metres in EPSG:32705, as the sample layers.

The dataset is a folder of ``files`` GeoParquet files (WKB points, GeoParquet 1.1 ``geo``
metadata), each written from its own random stream, so that one chunk is in memory at a time
and a file can be regenerated alone. Run from the repository root::

    python bench/scale_data.py [--points 100000000] [--groups 1000] [--files 100]
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

DATA_DIR = Path(__file__).resolve().parent / "data"
SEED = 20261202
#: bump when the layout changes, so that an old dataset is not reused
DATA_VERSION = 1
CRS_CODE = 32705
CENTRE = (500_000.0, 6_120_000.0)
HALF_SIDE = 300_000.0
SETTLEMENTS = 4
ROW_GROUP = 1 << 18


def dataset_path(points: int, groups: int, files: int) -> Path:
    """Folder of one (points, groups, files) dataset; seed and version are part of the name."""
    return DATA_DIR / f"scale_{points}_groups_{groups}_files_{files}_seed_{SEED}_v{DATA_VERSION}"


def districts(groups: int) -> dict[str, np.ndarray]:
    """Per district: share of the points, settlement centres, spreads and shares, scatter box."""
    rng = np.random.default_rng([SEED, groups])
    share = rng.lognormal(0.0, 1.2, groups)
    share /= share.sum()
    centre = np.asarray(CENTRE) + rng.uniform(-HALF_SIDE, HALF_SIDE, (groups, 2))
    radius = rng.uniform(3_000.0, 15_000.0, groups)
    towns = centre[:, None, :] + rng.uniform(-1, 1, (groups, SETTLEMENTS, 2)) * radius[:, None, None]
    spread = np.exp(rng.uniform(np.log(150.0), np.log(4_000.0), (groups, SETTLEMENTS)))
    town_share = rng.dirichlet(np.ones(SETTLEMENTS), groups)
    return {
        "share": share,
        "centre": centre,
        "radius": radius,
        "towns": towns,
        "spread": spread,
        "town_share": town_share,
    }


def chunk(part: int, rows: int, layout: dict[str, np.ndarray]) -> pa.Table:
    """One file's rows: district code, residents and WKB points, from the part's own stream."""
    rng = np.random.default_rng([SEED, part])
    groups = layout["share"].size
    zone = np.searchsorted(np.cumsum(layout["share"]), rng.random(rows), side="right")
    zone = np.minimum(zone, groups - 1).astype(np.int32)
    town = (rng.random(rows)[:, None] > np.cumsum(layout["town_share"][zone], axis=1)).sum(axis=1)
    town = np.minimum(town, SETTLEMENTS - 1)
    xy = layout["towns"][zone, town] + rng.standard_normal((rows, 2)) * layout["spread"][zone, town][:, None]
    scatter = rng.random(rows) < 0.01  # 1 % spread thinly over the district
    box = (
        layout["centre"][zone[scatter]]
        + rng.uniform(-1, 1, (int(scatter.sum()), 2)) * layout["radius"][zone[scatter], None]
    )
    xy[scatter] = box
    residents = rng.integers(1, 7, rows).astype(np.float64)
    return pa.table({"zone": zone, "residents": residents, "geometry": wkb_points(xy[:, 0], xy[:, 1])})


def wkb_points(x: np.ndarray, y: np.ndarray) -> pa.Array:
    """A WKB binary array of 2-D points, built from the buffers (21 bytes each, little-endian)."""
    n = x.size
    record = np.zeros(n, dtype=[("order", "u1"), ("kind", "<u4"), ("x", "<f8"), ("y", "<f8")])
    record["order"], record["kind"], record["x"], record["y"] = 1, 1, x, y
    offsets = np.arange(0, 21 * (n + 1), 21, dtype=np.int32)
    return pa.Array.from_buffers(
        pa.binary(), n, [None, pa.py_buffer(offsets), pa.py_buffer(record.tobytes())]
    )


def geo_metadata(bbox=None) -> bytes:
    """GeoParquet 1.1 ``geo`` metadata of a WKB point column in EPSG:32705."""
    import pyproj

    column = {
        "encoding": "WKB",
        "geometry_types": ["Point"],
        "crs": pyproj.CRS.from_epsg(CRS_CODE).to_json_dict(),
    }
    if bbox is not None:
        column["bbox"] = [float(v) for v in bbox]
    return json.dumps(
        {"version": "1.1.0", "primary_column": "geometry", "columns": {"geometry": column}}
    ).encode()


def make_dataset(points: int, groups: int, files: int, *, quiet: bool = False) -> Path:
    """Write the dataset if it is missing (file by file, atomically); returns its folder."""
    folder = dataset_path(points, groups, files)
    if (folder / "_complete").exists():
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    layout = districts(groups)
    sizes = np.full(files, points // files)
    sizes[: points % files] += 1
    start = time.perf_counter()
    for part, rows in enumerate(sizes):
        target = folder / f"part_{part:05d}.parquet"
        if target.exists():
            continue
        table = chunk(part, int(rows), layout)
        table = table.replace_schema_metadata({"geo": geo_metadata()})
        temporary = target.with_suffix(".tmp")
        pq.write_table(table, temporary, row_group_size=ROW_GROUP, compression="snappy")
        temporary.rename(target)
        if not quiet:
            done = part + 1
            print(f"  wrote {target.name} ({done}/{files}, {time.perf_counter() - start:.0f} s)", flush=True)
    (folder / "_complete").write_text("")
    return folder


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=100_000_000)
    parser.add_argument("--groups", type=int, default=1_000)
    parser.add_argument("--files", type=int, default=100)
    args = parser.parse_args()
    print(make_dataset(args.points, args.groups, args.files))


if __name__ == "__main__":
    main()
