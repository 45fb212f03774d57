"""A small synthetic RunResult for the output tests (invented values, 40 x 50 grid).

Only the *shape* of a run is invented here; the checks in the tests compare outputs
with outside references (the GPX schema, pyproj, scipy, scikit-learn, matplotlib).
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
from affine import Affine
from rasterio import features
from shapely.geometry import LineString, shape
from skimage import measure

from screener.grid import Grid
from screener.results import RecordDrop, RunResult, TaxonRecords, TaxonResult, Threshold

TAXA = ("Alpha aurea", "Alpha <b>beta</b> & co")


def make_grid(geographic: bool = False, south: bool = True) -> Grid:
    """40 x 50 grid: 1 km UTM cells (zone 36 south) or 0.01 degree cells."""
    if geographic:
        top = -2.0 if south else 46.5
        return Grid("EPSG:4326", Affine(0.01, 0, 36.0, 0, -0.01, top), (40, 50))
    north0 = 9_800_000.0 if south else 5_100_000.0
    epsg = "EPSG:32736" if south else "EPSG:32636"
    return Grid(epsg, Affine(1000, 0, 400_000, 0, -1000, north0), (40, 50))


def _bump(rr, cc, r0, c0, s):
    return np.exp(-((rr - r0) ** 2 + (cc - c0) ** 2) / (2 * s * s))


def make_run(
    geographic: bool = False,
    south: bool = True,
    sensitive: bool = True,
    elevation: bool = True,
) -> RunResult:
    grid = make_grid(geographic, south)
    mask = np.ones(grid.shape, bool)
    mask[:2, :3] = False
    grid = grid.with_mask(mask)
    rr, cc = np.mgrid[0 : grid.n_rows, 0 : grid.n_cols].astype(float)
    rng = np.random.default_rng(1)
    maps = [
        0.9 * _bump(rr, cc, 10, 12, 5) + 0.7 * _bump(rr, cc, 30, 40, 3),
        0.85 * _bump(rr, cc, 28, 15, 5) + 0.6 * _bump(rr, cc, 8, 40, 3),
    ]
    taxa = {}
    for k, (name, s) in enumerate(zip(TAXA, maps, strict=True)):
        s = np.where(mask, s, np.nan).astype(np.float32)
        centre = (10, 12) if k == 0 else (28, 15)
        rows = np.clip(centre[0] + rng.integers(-3, 4, 6), 0, grid.n_rows - 1)
        cols = np.clip(centre[1] + rng.integers(-3, 4, 6), 0, grid.n_cols - 1)
        x, y = grid.xy(rows, cols)
        lon, lat = grid.to_lonlat(x, y)
        rec = TaxonRecords(
            name,
            np.asarray(lon),
            np.asarray(lat),
            np.asarray(x),
            np.asarray(y),
            rows,
            cols,
            np.arange(2, 8) + 10 * k,
            sensitive=sensitive and k == 1,
        )
        vals = s[rows, cols]
        mtp = float(np.nanmin(vals))
        area = grid.cell_area_km2
        th = {
            "mtp": Threshold("mtp", mtp, float(area[s >= mtp].sum()), 0.0),
            "relaxed": Threshold(
                "relaxed", 0.7 * mtp, float(area[s >= 0.7 * mtp].sum()), 0.0
            ),
        }
        mess = np.where(mask, 10 - 0.6 * cc, np.nan)
        taxa[name] = TaxonResult(
            name,
            rec,
            s,
            agreement=np.where(mask, np.clip(s * 1.2, 0, 1), np.nan),
            mess=mess,
            thresholds=th,
            evaluation=[
                {
                    "taxon": name,
                    "algorithm": "envelope",
                    "n_records": 6,
                    "auc": 0.81 + 0.02 * k,
                    "threshold_mtp": mtp,
                    "omission_mtp": 0.0,
                },
                {
                    "taxon": name,
                    "algorithm": "consensus",
                    "n_records": 6,
                    "auc": 0.85,
                    "threshold_mtp": mtp,
                    "omission_mtp": 0.0,
                },
            ],
        )
    clade = np.fmax(*[t.suitability for t in taxa.values()])
    lab = measure.label(np.nan_to_num(clade) >= 0.35, connectivity=2)
    rows_out = []
    for i, (geom, val) in enumerate(
        features.shapes(lab.astype(np.int32), mask=lab > 0, transform=grid.transform)
    ):
        poly = shape(geom)
        cells = lab == int(val)
        r, c = np.nonzero(cells)
        j = int(np.argmax(clade[cells]))
        x, y = grid.xy(r[j], c[j])
        lon, lat = grid.to_lonlat(x, y)
        kinds = ["within-range", "near-range", "isolated"]
        rows_out.append(
            {
                "site_id": f"S{i + 1:02d}",
                "kind": kinds[i % 3],
                "longitude": float(lon),
                "latitude": float(lat),
                "x": float(x),
                "y": float(y),
                "area_km2": float(grid.cell_area_km2[cells].sum()),
                "mean_suitability": float(np.nanmean(clade[cells])),
                "max_suitability": float(np.nanmax(clade[cells])),
                "agreement": 0.8,
                "novel_share": 0.1 * i,
                "clamped_share": 0.15 * i + 0.05,
                "elevation_min": 1200.0 + 50 * i,
                "elevation_max": 1450.0 + 50 * i,
                "nearest_taxon": TAXA[i % 2],
                "cost_distance": 3.0 * i,
                "gap_km": 2.0 * i,
                "barrier_depth": 0.1,
                "nearest_record_km": 5.0 + i,
                "walk_hours": np.nan if i == 1 else 4.5 + i,
                "stability": 0.9,
                "score_suitability": 0.3 - 0.05 * i,
                "score_isolation": 0.1 * i,
                "score_access": 0.05,
                "score": 0.35 + 0.05 * i,
                "rank_robustness": 0.7,
                "geometry": poly,
            }
        )
    sites = gpd.GeoDataFrame(rows_out, geometry="geometry", crs=grid.pyproj_crs)
    sites = sites.sort_values("score", ascending=False).reset_index(drop=True)
    sites.insert(0, "rank", np.arange(1, len(sites) + 1))
    paths = gpd.GeoDataFrame(
        {"site_id": list(sites["site_id"])},
        geometry=[
            LineString([(float(sites.x[0]), float(sites.y[0])), (float(x), float(y))])
            for x, y in zip(sites.x, sites.y, strict=True)
        ],
        crs=grid.pyproj_crs,
    )
    elev = None
    if elevation:
        elev = np.where(mask, 800 + 900 * _bump(rr, cc, 20, 25, 12) + 8 * cc, np.nan)
    overlap = pd.DataFrame(
        [
            {
                "taxon_a": TAXA[0],
                "taxon_b": TAXA[1],
                "space": "geographic",
                "D": 0.31,
                "I": 0.55,
                "equivalency_p": 0.02,
                "similarity_p_ab": 0.3,
                "similarity_p_ba": 0.4,
            },
            {
                "taxon_a": TAXA[0],
                "taxon_b": TAXA[1],
                "space": "environmental",
                "D": 0.42,
                "I": 0.66,
                "equivalency_p": 0.04,
                "similarity_p_ab": 0.2,
                "similarity_p_ba": 0.6,
            },
        ]
    )
    return RunResult(
        grid=grid,
        layer_names=["bio1", "bio12", "elevation"],
        taxa=taxa,
        sites=sites,
        dropped=[
            RecordDrop(3, TAXA[0], "latitude 95.0 is beyond +/-90"),
            RecordDrop(9, "", "taxon cell is empty <script>x</script>"),
        ],
        overlap=overlap,
        overlap_readings=[
            "Niches of the two taxa are less equivalent than chance "
            "(p = 0.02) but not more similar than their backgrounds."
        ],
        paths=paths,
        barrier=np.where(mask, 1 - clade, np.nan).astype(np.float32),
        elevation=elev,
        settings={"seed": 7, "threshold": "mtp"},
        provenance={"screener": "0.1.0", "inputs": {"records.csv": "sha256:abc"}},
        warnings=["Predictions extrapolate for bio12 in the east (MESS < 0)."],
    )


def ensure_debian_tool(binary: str, package: str) -> str | None:
    """Path of ``binary``; installs Debian's ``package`` when running as root.

    Returns None (with the reason printed) when the tool is absent and cannot be
    installed; callers skip.
    """
    import os
    import shutil
    import subprocess

    found = shutil.which(binary)
    if found:
        return found
    if os.geteuid() != 0 or not shutil.which("apt-get"):
        print(f"{binary} is absent and this is not a root Debian session")
        return None
    env = {**os.environ, "DEBIAN_FRONTEND": "noninteractive"}
    try:
        subprocess.run(
            ["apt-get", "update", "-qq"],
            check=True,
            timeout=300,
            env=env,
            capture_output=True,
        )
        subprocess.run(
            ["apt-get", "install", "-y", "-qq", package],
            check=True,
            timeout=600,
            env=env,
            capture_output=True,
        )
    except (subprocess.SubprocessError, OSError) as exc:
        print(f"could not install {package}: {exc}")
        return None
    return shutil.which(binary)


def figure_points(fig) -> np.ndarray:
    """Every point an artist of a figure draws, in data coordinates: the offsets of
    marker collections (scatter), the vertices of lines, patches and paths, and the
    anchors of texts."""
    import matplotlib.text as mtext

    pts = [np.empty((0, 2))]
    for art in fig.findobj():
        if hasattr(art, "get_offsets"):
            pts.append(np.asarray(art.get_offsets(), float).reshape(-1, 2))
        if hasattr(art, "get_xydata"):
            pts.append(np.asarray(art.get_xydata(), float).reshape(-1, 2))
        if hasattr(art, "get_paths"):
            pts += [np.asarray(p.vertices, float).reshape(-1, 2) for p in art.get_paths()]
        elif hasattr(art, "get_path") and not isinstance(art, mtext.Text):
            pts.append(np.asarray(art.get_path().vertices, float).reshape(-1, 2))
        if isinstance(art, mtext.Text):
            pts.append(np.asarray([art.get_position()], float))
    return np.concatenate(pts)
