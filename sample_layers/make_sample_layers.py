"""Generate the bundled demo layers for ``pairspread``.

The demo scenario is the *Isle of Quenwick*, an island region that does
not exist. The island outline, district names, site names, household
records and every number in these layers are invented and generated
at random from a fixed seed. They describe no real place or population.
The island sits in open South Pacific ocean (about 153 deg W, 35 deg S),
far from any land, so it cannot be mistaken for real geography.

Outputs (written beside this script, replacing earlier outputs):

``quenwick.gpkg``
    GeoPackage with these layers:

    * ``households`` (Point): about 20,000 households in 8 districts.
      Fields: ``hh_id`` (int), ``district`` (text, NULL for 5
      unassigned addresses), ``tenure`` (text, "owned"/"rented"),
      ``residents`` (int, 1-8).
    * ``service_sites`` (Point): 40 sites. Fields: ``site_id`` (int),
      ``site_name`` (text), ``site_kind`` (text, "clinic"/"school"/
      "depot"), ``capacity`` (int).
    * ``districts`` (Polygon): a rough outline per district, made from
      the convex hull of its core households and clipped to the coast.
      Fields: ``district`` (text), ``hh_count`` (int). The outlines
      only show where each district lies. They may overlap and are
      not a partition of the island.
    * ``island`` (Polygon): the coastline. Field: ``name`` (text).
    * ``wards`` (Polygon): 14 wards that partition the island (every
      point of the island lies in exactly one ward, up to shared
      edges): the Voronoi cells of invented ward seats, clipped to the
      coast. Fields: ``ward`` (text), ``ward_no`` (int), ``area_km2``
      (real), ``population`` (int, the residents of the households
      inside the ward).

``households_east.shp`` (with ``.shx``, ``.dbf``, ``.prj``, ``.cpg``)
    The households of the three easternmost districts, with the same
    fields as the ``households`` layer.

All layers use EPSG:32705 (WGS 84 / UTM zone 5S), in metres.

Notes
-----
The output is deterministic. Every random draw comes from
``numpy.random.default_rng(20261201)``. Each part of the scenario gets
its own child stream (``Generator.spawn``), so changing one part does
not change the others. The GeoPackage timestamps are fixed with the
GDAL option ``OGR_CURRENT_DATE``, and the shapefile's ``.dbf`` date
with ``DBF_DATE_LAST_UPDATE``. The script writes everything into a
temporary folder next to itself and then moves each file into place
with ``os.replace``, so a failed run leaves the earlier outputs as they
were.

Run from the repository root::

    python sample_layers/make_sample_layers.py
"""

from __future__ import annotations

import os
import shutil
import tempfile
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import shapely
from shapely.geometry import Polygon

HERE = Path(__file__).resolve().parent

SEED = 20261201
CRS = "EPSG:32705"  # WGS 84 / UTM zone 5S

# Island centre in UTM 5S metres, about 153.0 W, 35.06 S (open ocean).
CENTRE_E = 500_000.0
CENTRE_N = 6_120_000.0

GPKG_NAME = "quenwick.gpkg"
SHP_STEM = "households_east"
SHP_SUFFIXES = (".shp", ".shx", ".dbf", ".prj", ".cpg")

# A fixed timestamp for the GeoPackage metadata and the .dbf header, so
# that repeated runs give the same bytes.
FIXED_TIMESTAMP = "2026-12-01T00:00:00.000Z"

N_NULL_DISTRICT = 5  # households with no district (unassigned addresses)
N_EAST_DISTRICTS = 3  # districts copied to the shapefile subset

# District table. Offsets are in km from the island centre. ``spread`` is
# the standard deviation along the major axis, in km. ``aspect`` is
# minor/major, so values below 1 give elongated (valley or coastal)
# settlements. ``angle`` is the major-axis direction in degrees
# counter-clockwise from east. ``p_rented`` is the share of rented homes.
# Towns have more rented homes than farmland, and the island-wide share
# comes out near 60 % owned / 40 % rented. The counts add up to 19,995,
# and with the unassigned addresses the total is 20,000.
# fmt: off
DISTRICTS = [
    # name          dx     dy   spread aspect angle  count  p_rented
    ("Lintmere",    -3.0,   2.0,  0.9,  0.80,   20, 5200, 0.52),  # main town
    ("Pennacove",    9.0,  -6.5,  0.6,  0.70,  -30, 3100, 0.50),  # harbour
    ("Ostravel",   -10.0,  -5.0,  1.5,  0.60,   60, 2700, 0.45),  # market town
    ("Saltrigg",    14.0,   4.0,  0.5,  0.90,    0,  895, 0.42),  # fishing village
    ("Fellmarrow",   2.0,  10.0,  5.0,  0.50,  -15, 2100, 0.28),  # north farmland
    ("Wyndercombe", -12.0,  7.0,  4.0,  0.55,  110, 1600, 0.25),  # west valleys
    ("Gorsebeck",    0.5,  -4.0,  8.0,  0.85,   45, 2900, 0.22),  # upland farms
    ("Ambrevale",   11.5,   0.5,  3.5,  0.45,   80, 1500, 0.30),  # east vale
]
# fmt: on

# Ward seats in km from the island centre. The wards are the Voronoi
# cells of these seats clipped to the coast, so they partition the island.
# fmt: off
WARD_SEATS = [
    ("Lintmere Central",   -3.0,   2.0),
    ("Lintmere North",     -3.5,   5.5),
    ("Pennacove",           9.0,  -6.5),
    ("Ostravel",          -10.0,  -5.0),
    ("Ostravel South",     -7.5, -11.0),
    ("Saltrigg",           15.5,   4.0),
    ("Fellmarrow West",    -1.5,  11.0),
    ("Fellmarrow East",     6.0,   9.5),
    ("Wyndercombe",       -13.5,   7.5),
    ("Wyndercombe Coast", -19.0,   0.5),
    ("Gorsebeck",           1.0,  -3.0),
    ("Gorsebeck South",     2.5, -11.5),
    ("Ambrevale",          11.0,  -0.5),
    ("Ambrevale North",    10.5,   5.5),
]
# fmt: on

# Rough household size distribution for 1..8 residents. Most households
# have one or two people and large households are rare.
RESIDENT_P = np.array([0.28, 0.34, 0.15, 0.13, 0.06, 0.025, 0.01, 0.005])

# Service sites per district as (schools, clinics, depots): 16 + 13 + 11 = 40.
# fmt: off
SITES_PER_DISTRICT = {
    "Lintmere":    (4, 3, 2),
    "Pennacove":   (2, 2, 2),
    "Ostravel":    (2, 2, 1),
    "Saltrigg":    (1, 1, 1),
    "Fellmarrow":  (2, 1, 1),
    "Wyndercombe": (2, 1, 1),
    "Gorsebeck":   (2, 2, 2),
    "Ambrevale":   (1, 1, 1),
}
# fmt: on

# Capacity ranges per kind, each in its own unit: pupils for schools,
# appointments a day for clinics, pallet spaces for depots. ``step``
# rounds the values to tidy numbers.
CAPACITY = {"school": (60, 900, 10), "clinic": (15, 120, 5), "depot": (200, 2400, 50)}


# --------------------------------------------------------------------------
# Geometry helpers
# --------------------------------------------------------------------------


def make_island(rng: np.random.Generator) -> Polygon:
    """Return the island outline, a star-shaped polygon with a wavy coast.

    The radius is a sum of a few low harmonics with random phases. This
    gives bays and headlands without self-intersections, because the
    radius stays positive. The shape is stretched east-west so that the
    island is about 40 km across.
    """
    theta = np.linspace(0.0, 2.0 * np.pi, 360, endpoint=False)
    radius = np.full_like(theta, 18_500.0)
    for harmonic, amplitude in ((2, 0.10), (3, 0.07), (5, 0.04), (9, 0.02)):
        phase = rng.uniform(0.0, 2.0 * np.pi)
        radius *= 1.0 + amplitude * np.sin(harmonic * theta + phase)
    x = CENTRE_E + 1.12 * radius * np.cos(theta)
    y = CENTRE_N + 0.95 * radius * np.sin(theta)
    island = Polygon(np.column_stack([np.round(x, 1), np.round(y, 1)]))
    assert island.is_valid, "island outline must be a valid polygon"
    return island


def sample_cluster(
    rng: np.random.Generator,
    land: Polygon,
    centre: tuple[float, float],
    sigma_major: float,
    aspect: float,
    angle_deg: float,
    n: int,
) -> np.ndarray:
    """Draw ``n`` points from a rotated 2-D Gaussian, keeping those on land.

    Rejection sampling drops points that fall in the sea. Loose rural
    districts near the coast therefore get a cut-off edge, as a real
    coastline would give them. Batches are drawn until there are ``n``
    points, so the result depends only on the generator state.
    """
    shapely.prepare(land)
    angle = np.deg2rad(angle_deg)
    rot = np.array([[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]])
    scale = np.array([sigma_major, sigma_major * aspect])
    kept: list[np.ndarray] = []
    have = 0
    while have < n:
        batch = rng.standard_normal((2 * n, 2)) * scale @ rot.T + np.asarray(centre)
        on_land = shapely.contains_xy(land, batch[:, 0], batch[:, 1])
        kept.append(batch[on_land])
        have += int(on_land.sum())
    return np.concatenate(kept)[:n]


# --------------------------------------------------------------------------
# Layer builders
# --------------------------------------------------------------------------


def build_households(rng: np.random.Generator, land: Polygon) -> gpd.GeoDataFrame:
    """Build the households layer.

    The rows are shuffled before ``hh_id`` is given out, so the file is
    not sorted by district. The grouping code must not rely on sorted
    input.
    """
    # Households stay 150 m back from the coastline.
    inland = land.buffer(-150.0)
    parts = []
    for name, dx, dy, spread, aspect, angle, count, p_rented in DISTRICTS:
        xy = sample_cluster(
            rng,
            inland,
            (CENTRE_E + dx * 1000.0, CENTRE_N + dy * 1000.0),
            spread * 1000.0,
            aspect,
            angle,
            count,
        )
        parts.append(
            pd.DataFrame(
                {
                    "district": name,
                    "tenure": np.where(rng.random(count) < p_rented, "rented", "owned"),
                    "residents": rng.choice(np.arange(1, 9), size=count, p=RESIDENT_P),
                    "x": xy[:, 0],
                    "y": xy[:, 1],
                }
            )
        )

    # The unassigned addresses are ordinary households scattered across
    # the island with no district recorded. They show how NULL groups
    # are handled.
    n_null = N_NULL_DISTRICT
    xy = sample_cluster(rng, inland, (CENTRE_E, CENTRE_N), 9_000.0, 0.8, 0.0, n_null)
    parts.append(
        pd.DataFrame(
            {
                "district": [None] * n_null,
                "tenure": rng.choice(["owned", "rented"], size=n_null, p=[0.6, 0.4]),
                "residents": rng.choice(np.arange(1, 9), size=n_null, p=RESIDENT_P),
                "x": xy[:, 0],
                "y": xy[:, 1],
            }
        )
    )

    df = pd.concat(parts, ignore_index=True)
    df = df.iloc[rng.permutation(len(df))].reset_index(drop=True)
    df.insert(0, "hh_id", np.arange(1, len(df) + 1, dtype=np.int32))
    df["district"] = df["district"].astype(object)
    df["residents"] = df["residents"].astype(np.int32)
    # Decimetre precision is plenty for a demo and keeps the values tidy.
    geometry = gpd.points_from_xy(df.pop("x").round(1), df.pop("y").round(1), crs=CRS)
    return gpd.GeoDataFrame(df, geometry=geometry)


def _compass(dx: float, dy: float) -> str:
    """Return the nearest of eight compass words for an offset vector."""
    words = [
        "East",
        "Northeast",
        "North",
        "Northwest",
        "West",
        "Southwest",
        "South",
        "Southeast",
    ]
    return words[int(np.round(np.arctan2(dy, dx) / (np.pi / 4))) % 8]


def build_service_sites(rng: np.random.Generator, land: Polygon) -> gpd.GeoDataFrame:
    """Build the service sites layer.

    Schools and clinics lie near the middle of their district. Depots
    lie on the outskirts, where land for warehouses would be. Each name
    is the district name with a compass word for the site's side of the
    district centre, or with no compass word for the site nearest the
    centre. A number is added if a name would repeat.
    """
    inland = land.buffer(-150.0)
    labels = {"school": "School", "clinic": "Clinic", "depot": "Depot"}
    rows = []
    used_names: set[str] = set()
    for name, dx, dy, spread, aspect, angle, _count, _p in DISTRICTS:
        cx, cy = CENTRE_E + dx * 1000.0, CENTRE_N + dy * 1000.0
        n_school, n_clinic, n_depot = SITES_PER_DISTRICT[name]
        for kind, n, reach in (
            ("school", n_school, 0.6),
            ("clinic", n_clinic, 0.5),
            ("depot", n_depot, 1.3),
        ):
            if n == 0:
                continue
            xy = sample_cluster(
                rng, inland, (cx, cy), reach * spread * 1000.0, aspect, angle, n
            )
            # The site nearest the district centre gets the plain name.
            order = np.argsort(np.hypot(xy[:, 0] - cx, xy[:, 1] - cy))
            lo, hi, step = CAPACITY[kind]
            for rank, i in enumerate(order):
                px, py = xy[i]
                if rank == 0:
                    base = f"{name} {labels[kind]}"
                else:
                    base = f"{_compass(px - cx, py - cy)} {name} {labels[kind]}"
                site_name, k = base, 2
                while site_name in used_names:
                    site_name, k = f"{base} {k}", k + 1
                used_names.add(site_name)
                capacity = int(rng.integers(lo // step, hi // step + 1)) * step
                rows.append((site_name, kind, capacity, round(px, 1), round(py, 1)))

    df = pd.DataFrame(rows, columns=["site_name", "site_kind", "capacity", "x", "y"])
    df.insert(0, "site_id", np.arange(1, len(df) + 1, dtype=np.int32))
    df["capacity"] = df["capacity"].astype(np.int32)
    geometry = gpd.points_from_xy(df.pop("x"), df.pop("y"), crs=CRS)
    return gpd.GeoDataFrame(df, geometry=geometry)


def build_districts(households: gpd.GeoDataFrame, land: Polygon) -> gpd.GeoDataFrame:
    """Build a rough outline for each district.

    A hull of all points would stretch to reach a few far-out
    households, so the hull covers only the 95 % of households nearest
    the district's mean position, measured with the covariance-scaled
    (Mahalanobis) distance. The hull is buffered by 300 m, and the
    result is clipped to the coastline.
    """
    rows = []
    for name, *_rest in DISTRICTS:
        members = households[households["district"] == name]
        xy = shapely.get_coordinates(members.geometry.values)
        centred = xy - xy.mean(axis=0)
        inv_cov = np.linalg.inv(np.cov(centred, rowvar=False))
        d2 = np.einsum("ij,jk,ik->i", centred, inv_cov, centred)
        core = xy[d2 <= np.quantile(d2, 0.95)]
        hull = shapely.convex_hull(shapely.multipoints(core)).buffer(300.0, quad_segs=4)
        outline = shapely.set_precision(hull.intersection(land), 0.1)
        if outline.geom_type != "Polygon":
            # Clipping to the coast could, in principle, leave several
            # parts. Keep the largest so the layer stays pure Polygon.
            outline = max(outline.geoms, key=lambda g: g.area)
        rows.append((name, len(members), outline))
    return gpd.GeoDataFrame(
        pd.DataFrame(
            {
                "district": [r[0] for r in rows],
                "hh_count": np.array([r[1] for r in rows], dtype=np.int32),
            }
        ),
        geometry=[r[2] for r in rows],
        crs=CRS,
    )


def build_wards(households: gpd.GeoDataFrame, land: Polygon) -> gpd.GeoDataFrame:
    """Build the ward layer: Voronoi cells of the ward seats, clipped to the coast.

    The cells cover the island without gaps or overlaps, so every
    household lies in one ward (or on a shared edge). ``population``
    adds up the residents of the households inside each ward.
    """
    seats = shapely.points(
        [CENTRE_E + dx * 1000.0 for _, dx, _ in WARD_SEATS],
        [CENTRE_N + dy * 1000.0 for _, _, dy in WARD_SEATS],
    )
    cells = shapely.get_parts(shapely.voronoi_polygons(shapely.multipoints(seats), extend_to=land))
    outlines = []
    for seat in seats:
        cell = next(c for c in cells if c.contains(seat))
        outline = shapely.set_precision(cell.intersection(land), 0.1)
        if outline.geom_type != "Polygon":
            outline = max(outline.geoms, key=lambda g: g.area)
        outlines.append(outline)
    outlines = np.array(outlines, dtype=object)
    xy = shapely.get_coordinates(households.geometry.values)
    population = []
    for outline in outlines:
        inside = shapely.intersects_xy(outline, xy[:, 0], xy[:, 1])
        population.append(int(households["residents"].to_numpy()[inside].sum()))
    return gpd.GeoDataFrame(
        pd.DataFrame(
            {
                "ward": [name for name, _, _ in WARD_SEATS],
                "ward_no": np.arange(1, len(WARD_SEATS) + 1, dtype=np.int32),
                "area_km2": np.round(shapely.area(outlines) / 1e6, 3),
                "population": np.array(population, dtype=np.int32),
            }
        ),
        geometry=outlines,
        crs=CRS,
    )


def eastern_district_names(n: int) -> list[str]:
    """Return the ``n`` districts whose centres lie furthest east."""
    by_east = sorted(DISTRICTS, key=lambda d: d[1], reverse=True)
    return [d[0] for d in by_east[:n]]


# --------------------------------------------------------------------------
# Writing
# --------------------------------------------------------------------------


def write_outputs(
    layers: dict[str, gpd.GeoDataFrame], east: gpd.GeoDataFrame
) -> list[Path]:
    """Write all outputs to a temporary folder, then move them into place.

    The temporary folder is inside ``sample_layers/``, on the same file
    system as the outputs, so ``os.replace`` is an atomic rename. Only
    this script's own output files are replaced.
    """
    tmp = Path(tempfile.mkdtemp(prefix=".tmp_make_", dir=HERE))
    try:
        gpkg = tmp / GPKG_NAME
        for name, gdf in layers.items():
            pyogrio.write_dataframe(
                gdf,
                gpkg,
                layer=name,
                driver="GPKG",
                layer_options={
                    "DESCRIPTION": f"Isle of Quenwick (invented demo data): {name}",
                },
            )
        # RESIZE shrinks the text fields to their longest value. Without
        # it GDAL uses 80 characters per field and the .dbf is much
        # larger. ENCODING writes the .cpg sidecar. The .dbf header holds
        # a "last update" date, which is fixed so the bytes do not depend
        # on the day the script runs.
        pyogrio.write_dataframe(
            east,
            tmp / f"{SHP_STEM}.shp",
            driver="ESRI Shapefile",
            layer_options={
                "ENCODING": "UTF-8",
                "RESIZE": "YES",
                "DBF_DATE_LAST_UPDATE": FIXED_TIMESTAMP[:10],
            },
        )

        produced = [GPKG_NAME] + [SHP_STEM + s for s in SHP_SUFFIXES]
        missing = [p for p in produced if not (tmp / p).exists()]
        if missing:
            raise RuntimeError(f"expected outputs were not written: {missing}")
        for fname in produced:
            os.replace(tmp / fname, HERE / fname)
        return [HERE / f for f in produced]
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


def main() -> None:
    """Build every layer and write the demo files beside this script."""
    # Fixed timestamps in the GeoPackage metadata tables, so that
    # repeated runs give the same bytes.
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": FIXED_TIMESTAMP})

    root = np.random.default_rng(SEED)
    island_rng, household_rng, site_rng = root.spawn(3)

    island = make_island(island_rng)
    households = build_households(household_rng, island)
    sites = build_service_sites(site_rng, island)
    districts = build_districts(households, island)
    wards = build_wards(households, island)
    island_gdf = gpd.GeoDataFrame(
        {"name": ["Isle of Quenwick"]}, geometry=[island], crs=CRS
    )

    east_names = eastern_district_names(N_EAST_DISTRICTS)
    east = households[households["district"].isin(east_names)].reset_index(drop=True)

    paths = write_outputs(
        {
            "households": households,
            "service_sites": sites,
            "districts": districts,
            "island": island_gdf,
            "wards": wards,
        },
        east,
    )
    for p in paths:
        print(f"{p.relative_to(HERE.parent)}  {p.stat().st_size / 1024:8.1f} KiB")


if __name__ == "__main__":
    main()
