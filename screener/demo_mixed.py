"""A second invented example: layers from mixed sources and a Darwin Core archive.

The fictional Tarrow Escarpment (an invented upland in open ocean, about 95.5 deg E,
27.5 deg S) and two invented sister taxa of the grasshopper genus *Vellicora*.  Its
layers come the way real ones do, each on its own grid:

- ``climate.tif``: a two-band stack at 30 arc-seconds (band descriptions
  "temperature" and "temperature_range"); the reference grid;
- ``rainfall.tif``: 0.05 degrees, another origin (refined, bilinear);
- ``elevation.tif``: 3 arc-seconds (slope derived at this resolution, then averaged);
- ``landcover.tif``: four classes in UTM zone 47S at 250 m (most frequent class).

The records are a Darwin Core Archive (``records.zip``: ``meta.xml`` and a
tab-separated ``occurrence.txt``) with the flaws a real export has: a record at 0,0,
one with a coordinate uncertainty of kilometres, a fossil specimen, one collected
before the date range, and a few georeferenced on another datum (Arc 1960, EPSG:4210,
transformed with pyproj).

Everything is generated from a seed: the same seed gives byte-identical files.

.. warning::
   The scenario is fiction.  In a real project the predictions are hypotheses for a
   survey, not proof; field work needs permits and landholders' consent under local
   law, and the coordinates of threatened taxa should be generalised in anything
   shared.

Run ``python -m screener.demo_mixed FOLDER`` to write it (then ``screener check
FOLDER/project.toml`` and ``screener run FOLDER/project.toml --out RESULTS``).
"""

from __future__ import annotations

import io
import sys
import zipfile
from pathlib import Path

import numpy as np
from affine import Affine

__all__ = ["PLACE", "GENUS", "TAXA", "DEFAULT_SEED", "write_mixed_example"]

PLACE = "Tarrow Escarpment"
GENUS = "Vellicora"
TAXA = ("Vellicora tarrowensis", "Vellicora dunmeri")
DEFAULT_SEED = 7

#: study area (degrees): west, south, east, north
AREA = (95.0, -28.0, 96.0, -27.2)
ARCSEC = 1.0 / 3600.0
UTM = "EPSG:32747"

META_XML = """<?xml version="1.0" encoding="UTF-8"?>
<archive xmlns="http://rs.tdwg.org/dwc/text/">
  <core encoding="UTF-8" fieldsTerminatedBy="\\t" linesTerminatedBy="\\n"
        fieldsEnclosedBy="" ignoreHeaderLines="1"
        rowType="http://rs.tdwg.org/dwc/terms/Occurrence">
    <files><location>occurrence.txt</location></files>
    <id index="0"/>
{fields}
  </core>
</archive>
"""

#: the core file's columns, Darwin Core terms (TDWG)
COLUMNS = ("occurrenceID", "basisOfRecord", "eventDate", "scientificName",
           "decimalLatitude", "decimalLongitude", "geodeticDatum",
           "coordinateUncertaintyInMeters", "recordedBy")


def elevation_m(lon, lat):
    """The invented terrain (m): two ridges and a plateau with small-scale relief."""
    lon = np.asarray(lon, float)
    lat = np.asarray(lat, float)
    ridge_a = 1400.0 * np.exp(-(((lon - 95.3) / 0.12) ** 2 + ((lat + 27.55) / 0.22) ** 2))
    ridge_b = 1100.0 * np.exp(-(((lon - 95.72) / 0.10) ** 2 + ((lat + 27.5) / 0.18) ** 2))
    plateau = 500.0 / (1.0 + np.exp(-(lat + 27.75) * 20.0))
    relief = 35.0 * np.sin(lon * 230.0) * np.cos(lat * 190.0)
    return 250.0 + ridge_a + ridge_b + plateau + relief


def temperature_c(lon, lat):
    return 27.0 - 0.0065 * elevation_m(lon, lat) + 0.8 * np.sin((lon - 95.0) * 6.0)


def rainfall_mm(lon, lat):
    return 700.0 + 0.45 * elevation_m(lon, lat) + 250.0 * (np.asarray(lon) - 95.0)


def _centres(transform, shape):
    rows, cols = np.mgrid[0:shape[0], 0:shape[1]]
    lon = transform.c + (cols + 0.5) * transform.a
    lat = transform.f + (rows + 0.5) * transform.e
    return lon, lat


def _write(path: Path, bands, crs, transform, *, dtype="float32", nodata=-9999.0,
           descriptions=None):
    import rasterio

    bands = [np.asarray(b) for b in bands]
    profile = dict(driver="GTiff", width=bands[0].shape[1], height=bands[0].shape[0],
                   count=len(bands), dtype=dtype, crs=crs, transform=transform,
                   nodata=nodata, tiled=True, blockxsize=256, blockysize=256,
                   compress="deflate")
    with rasterio.open(path, "w", **profile) as dst:
        for i, b in enumerate(bands, start=1):
            dst.write(b.astype(dtype), i)
            if descriptions:
                dst.set_band_description(i, descriptions[i - 1])


def _layers(folder: Path, rng) -> None:
    from pyproj import Transformer

    w, s, e, n = AREA
    # climate: 30 arc-seconds, exactly the study area (the reference grid)
    res = 30 * ARCSEC
    t = Affine(res, 0, w, 0, -res, n)
    shape = (round((n - s) / res), round((e - w) / res))
    lon, lat = _centres(t, shape)
    temp = temperature_c(lon, lat) + rng.normal(0, 0.15, shape)
    trange = 9.0 + 4.0 * (lat - s) + rng.normal(0, 0.1, shape)
    _write(folder / "climate.tif", [temp, trange], "EPSG:4326", t,
           descriptions=["temperature", "temperature_range"])
    # rainfall: 0.05 degrees, origin 0.02 degrees off, one cell of margin
    t = Affine(0.05, 0, w - 0.07, 0, -0.05, n + 0.07)
    shape = (round((n - s + 0.14) / 0.05) + 1, round((e - w + 0.14) / 0.05) + 1)
    lon, lat = _centres(t, shape)
    _write(folder / "rainfall.tif", [rainfall_mm(lon, lat)], "EPSG:4326", t)
    # elevation: 3 arc-seconds with 10 cells of margin
    res = 3 * ARCSEC
    t = Affine(res, 0, w - 10 * res, 0, -res, n + 10 * res)
    shape = (round((n - s) / res) + 20, round((e - w) / res) + 20)
    lon, lat = _centres(t, shape)
    _write(folder / "elevation.tif", [elevation_m(lon, lat)], "EPSG:4326", t)
    # land cover: UTM 47S at 250 m, classes by elevation and an east-west gradient
    to_utm = Transformer.from_crs("EPSG:4326", UTM, always_xy=True)
    xs, ys = to_utm.transform([w - 0.02, e + 0.02, w - 0.02, e + 0.02],
                              [s - 0.02, s - 0.02, n + 0.02, n + 0.02])
    x0, y1 = np.floor(min(xs) / 250) * 250, np.ceil(max(ys) / 250) * 250
    width = int(np.ceil((max(xs) - x0) / 250))
    height = int(np.ceil((y1 - min(ys)) / 250))
    t = Affine(250.0, 0, x0, 0, -250.0, y1)
    cols, rows = np.meshgrid(np.arange(width) + 0.5, np.arange(height) + 0.5)
    to_geo = Transformer.from_crs(UTM, "EPSG:4326", always_xy=True)
    lon, lat = to_geo.transform(x0 + cols * 250.0, y1 - rows * 250.0)
    z = elevation_m(lon, lat) + rng.normal(0, 60, (height, width))
    cover = np.select([z < 500, z < 900, z < 1300], [1, 2, 3], 4).astype(np.uint8)
    _write(folder / "landcover.tif", [cover], UTM, t, dtype="uint8", nodata=0)


def _records(rng) -> list:
    """Occurrence rows: each taxon where its niche fits, plus the planted flaws."""
    w, s, e, n = AREA
    res = 30 * ARCSEC
    lon = w + (np.arange(int(round((e - w) / res))) + 0.5) * res
    lat = n - (np.arange(int(round((n - s) / res))) + 0.5) * res
    glon, glat = np.meshgrid(lon, lat)
    temp, rain = temperature_c(glon, glat), rainfall_mm(glon, glat)
    niches = {TAXA[0]: (20.5, 1.2, 1200.0, 180.0), TAXA[1]: (18.5, 1.0, 1280.0, 160.0)}
    rows = []
    serial = 1000
    for taxon, (t0, ts, r0, rs) in niches.items():
        suit = np.exp(-0.5 * (((temp - t0) / ts) ** 2 + ((rain - r0) / rs) ** 2)).ravel()
        pick = rng.choice(suit.size, size=22, replace=False, p=suit / suit.sum())
        for k in pick:
            serial += 1
            x = glon.ravel()[k] + rng.uniform(-0.4, 0.4) * res
            y = glat.ravel()[k] + rng.uniform(-0.4, 0.4) * res
            year = int(rng.integers(1978, 2024))
            basis = "PreservedSpecimen" if rng.random() < 0.7 else "HumanObservation"
            rows.append([f"urn:catalog:TRW:ORTH:{serial}", basis,
                         f"{year}-{int(rng.integers(1, 13)):02d}-{int(rng.integers(1, 29)):02d}",
                         taxon, f"{y:.5f}", f"{x:.5f}", "WGS84",
                         str(int(rng.choice([10, 30, 100, 250]))), "Tarrow survey"])
    # planted flaws, each with its own occurrenceID
    good = rows[0]
    flaws = [
        ("urn:catalog:TRW:ORTH:9001", "PreservedSpecimen", "1999-03-02", TAXA[0],
         "0", "0", "WGS84", "", "placeholder coordinates"),
        ("urn:catalog:TRW:ORTH:9002", "PreservedSpecimen", "2004-11-20", TAXA[0],
         good[4], good[5], "WGS84", "8000", "locality named to the district only"),
        ("urn:catalog:TRW:ORTH:9003", "FossilSpecimen", "2011-07-14", TAXA[1],
         rows[-1][4], rows[-1][5], "WGS84", "30", "subfossil"),
        ("urn:catalog:TRW:ORTH:9004", "PreservedSpecimen", "1931-01-09", TAXA[1],
         rows[-2][4], rows[-2][5], "", "", "old collection"),
    ]
    rows += [list(f) for f in flaws]
    # three records georeferenced on Arc 1960 (EPSG:4210): written in that datum
    from pyproj import Transformer

    to_arc = Transformer.from_crs("EPSG:4326", "EPSG:4210", always_xy=True)
    for r in rows[3:6]:
        x, y = to_arc.transform(float(r[5]), float(r[4]))
        r[4], r[5], r[6] = f"{y:.6f}", f"{x:.6f}", "Arc 1960"
    return rows


def _archive(rows) -> bytes:
    fields = "\n".join(f'    <field index="{i}" term="http://rs.tdwg.org/dwc/terms/{c}"/>'
                       for i, c in enumerate(COLUMNS))
    body = "\t".join(COLUMNS) + "\n" + "".join("\t".join(r) + "\n" for r in rows)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        for name, data in (("meta.xml", META_XML.format(fields=fields)),
                           ("occurrence.txt", body)):
            info = zipfile.ZipInfo(name, date_time=(2026, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_DEFLATED
            zf.writestr(info, data)
    return buf.getvalue()


PROJECT_TOML = """[project]
name = "{place}: {genus} (invented example)"
random_state = {seed}

[occurrences]
path = "records.zip"
basis_of_record = ["PreservedSpecimen", "HumanObservation"]
date_from = "1970"

[layers]
paths = ["layers/*.tif"]
reference = "temperature"
elevation = "elevation"
derive = ["slope"]
categorical = ["landcover"]

[background]
buffer_km = 30.0
"""


def write_mixed_example(folder, *, seed: int = DEFAULT_SEED) -> Path:
    """Write the mixed-sources example into ``folder``; return the project file's path.

    Writes ``project.toml``, ``records.zip`` and ``layers/{climate,rainfall,elevation,
    landcover}.tif``.  The same seed gives byte-identical files.
    """
    folder = Path(folder)
    (folder / "layers").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    _layers(folder / "layers", rng)
    (folder / "records.zip").write_bytes(_archive(_records(rng)))
    project = folder / "project.toml"
    project.write_text(PROJECT_TOML.format(place=PLACE, genus=GENUS, seed=seed),
                       encoding="utf-8")
    return project


if __name__ == "__main__":  # pragma: no cover
    if len(sys.argv) != 2:
        sys.exit("usage: python -m screener.demo_mixed FOLDER")
    print(write_mixed_example(sys.argv[1]))
