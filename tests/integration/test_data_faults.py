"""Data faults a real archive contains, end to end through the command line: each is refused
with one message naming the file or tile (no traceback), or handled by a stated rule with a
caution, and never gives a wrong statistic with exit status 0."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
from pyproj import Transformer
from rasterio.enums import ColorInterp
from rasterio.transform import from_origin

from demaudit.service.cli.main import main
from tests.conftest import _grid_centres, terrain, write_tif

UTM32 = "EPSG:32632"


@pytest.fixture
def cli(dask_client, capsys):
    """Run ``demaudit ARGS`` in-process on the session's cluster: (status, stdout, stderr)."""

    def run(*args: str | Path) -> tuple[int, str, str]:
        scheduler = ["--scheduler", dask_client.scheduler.address, "--quiet"]
        extra = scheduler if args[0] == "run" else []
        code = main([str(a) for a in args] + extra)
        out, err = capsys.readouterr()
        assert "Traceback" not in out + err
        return code, out, err

    return run


def _summary(out: Path) -> dict:
    return json.loads((out / "summary.json").read_text())


def _tiles(doc: dict) -> dict[str, dict]:
    return {t["tile"]: t for t in doc["tiles"]}


def _rewrite(path: Path, edit, *, nodata=None) -> int:
    """Rewrite a GeoTIFF with edit(data) applied and the given nodata tag; pixels changed."""
    with rasterio.open(path) as src:
        data, transform, crs = src.read(1).astype(np.float64), src.transform, src.crs
    edited = edit(data.copy())
    write_tif(path, edited, crs=crs.to_string(), transform=transform, nodata=nodata)
    return int(np.count_nonzero(edited != data))


def _spec(root: Path, text: str, name: str = "job.yaml") -> Path:
    path = root / name
    path.write_text(text)
    return path


BASE = (
    "name: tiny\n"
    "test: {{tiles: test/*.tif, vertical_crs: ellipsoidal, units: metre{test}}}\n"
    "reference: {{tiles: ref, vertical_crs: 'EPSG:5773', units: metre{ref}}}\n"
)


# --- 2. voids coded -9999 without a nodata tag ---------------------------------------------


@pytest.mark.slow
def test_untagged_void_codes_refuse_the_tile_until_the_spec_names_them(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40, bias=0.25)
    code, _, _ = cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "clean")
    assert code == 0
    clean = _summary(tmp_path / "clean")["overall"]

    def voids(d):
        d[:10, :] = -9999.0
        return d

    changed = _rewrite(root / "test" / "t_0_0.tif", voids, nodata=None)
    assert changed == 400
    code, out, _ = cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "bad")
    assert code == 1  # a tile failed: not a clean run
    reason = _tiles(_summary(tmp_path / "bad"))["t_0_0"]["reason"]
    assert reason == (
        "test tile t_0_0: 400 of 1,600 pixels (25.0%) hold -9999, a common code for voids; the "
        "tile was not used. If -9999 marks voids, set 'test: {nodata: -9999}' in the job spec"
    )
    assert f"tile t_0_0 failed: {reason}" in out
    # the statistics hold the three other tiles only: no -9999 m pixel in them
    assert _summary(tmp_path / "bad")["overall"]["rmse"] < 1.0

    fixed_spec = _spec(root, BASE.format(test=", nodata: -9999", ref=""), "fixed.yaml")
    code, _, _ = cli("run", fixed_spec, "--out", tmp_path / "fixed")
    assert code == 0
    fixed = _summary(tmp_path / "fixed")["overall"]
    assert fixed["count"] == clean["count"] - 400
    assert fixed["rmse"] == pytest.approx(clean["rmse"], abs=0.02)  # not 542 m


@pytest.mark.slow
def test_a_reference_tile_with_void_codes_is_named(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)

    def voids(d):
        d[-20:, -20:] = -32767.0
        return d

    _rewrite(root / "ref" / "ref_0_0.tif", voids, nodata=None)
    code, out, _ = cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "o")
    assert code == 1
    reasons = {t: r.get("reason", "") for t, r in _tiles(_summary(tmp_path / "o")).items()}
    named = [t for t, r in reasons.items() if r.startswith("reference tile ref_0_0: ")]
    assert named and all("set 'reference: {nodata: -32767}'" in reasons[t] for t in named)
    assert "tile t_0_0 failed: reference tile ref_0_0" in out
    code, _, _ = cli(
        "run",
        _spec(root, BASE.format(test="", ref=", nodata: -32767"), "fixed.yaml"),
        "--out",
        tmp_path / "fixed",
    )
    assert code == 0


# --- 3. an orthophoto among the DEM tiles --------------------------------------------------


@pytest.mark.slow
def test_an_rgb_orthophoto_in_the_tile_folder_is_refused(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    code, _, _ = cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "clean")
    clean = _summary(tmp_path / "clean")["overall"]
    with rasterio.open(root / "test" / "t_0_0.tif") as src:
        profile = src.profile | {"count": 3, "dtype": "uint8", "nodata": None, "photometric": "RGB"}
    with rasterio.open(root / "test" / "ortho.tif", "w", **profile) as dst:
        dst.write(np.random.default_rng(0).integers(0, 255, (3, 40, 40), dtype=np.uint8))
        dst.colorinterp = [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
    code, out, _ = cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "o")
    assert code == 1
    doc = _summary(tmp_path / "o")
    message = (
        "tile ortho.tif holds 3 bands (red, green, blue) of uint8: not an elevation model, "
        "which has one band; it was not used"
    )
    assert _tiles(doc)["ortho"]["reason"] == message
    assert f"tile ortho failed: {message}" in out
    assert doc["overall"]["count"] == clean["count"]  # the orthophoto added no pixel
    assert doc["overall"]["rmse"] == pytest.approx(clean["rmse"], abs=1e-9)


# --- 4. overlapping test tiles --------------------------------------------------------------


@pytest.mark.slow
def test_a_redelivered_copy_is_counted_once(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    spec = _spec(root, BASE.format(test="", ref=""))
    cli("run", spec, "--out", tmp_path / "clean")
    clean = _summary(tmp_path / "clean")["overall"]
    shutil.copy(root / "test" / "t_0_0.tif", root / "test" / "t_0_0_copy.tif")
    code, _, _ = cli("run", spec, "--out", tmp_path / "o")
    doc = _summary(tmp_path / "o")
    assert doc["overall"]["count"] == clean["count"]  # not + 1,600
    assert doc["overall"]["rmse"] == pytest.approx(clean["rmse"], abs=1e-9)
    copy = _tiles(doc)["t_0_0_copy"]
    assert copy["status"] == "superseded"
    assert copy["reason"].startswith("every pixel lies in earlier-listed test tile(s) t_0_0")
    (caution,) = [c for c in doc["cautions"] if "overlap earlier-listed" in c]
    assert "t_0_0_copy: 1,600 of 1,600 pixels in t_0_0 (status superseded)" in caution
    # every ground pixel was audited once: a complete run (service/cli/main.py COMPLETE_STATUSES)
    assert code == 0


@pytest.mark.slow
def test_a_redelivery_of_the_same_name_in_another_folder_is_counted_once(
    make_archive, cli, tmp_path
):
    root = make_archive(tiles=2, pixels=40)
    cli("run", _spec(root, BASE.format(test="", ref="")), "--out", tmp_path / "clean")
    clean = _summary(tmp_path / "clean")["overall"]
    (root / "again").mkdir()
    shutil.copy(root / "test" / "t_1_1.tif", root / "again" / "t_1_1.tif")
    spec = _spec(
        root,
        BASE.format(test="", ref="").replace("tiles: test/*.tif", "tiles: [test/*.tif, again]"),
        "both.yaml",
    )
    code, _, _ = cli("run", spec, "--out", tmp_path / "o")
    doc = _summary(tmp_path / "o")
    assert doc["overall"]["count"] == clean["count"]
    tiles = _tiles(doc)
    assert tiles["t_1_1@test"]["status"] == "ok"
    assert tiles["t_1_1@again"]["status"] == "superseded"
    assert code == 0


@pytest.mark.slow
def test_a_partly_overlapping_tile_adds_only_its_own_ground(make_archive, cli, tmp_path):
    # u_north.tif covers the north half of t_0_0 and as much ground north of it; the result must
    # equal that of a tile holding only the uncovered (north) half
    root = make_archive(tiles=2, pixels=40)

    def heights(transform, shape):
        e, n = _grid_centres(transform, shape)
        return terrain(e, n) + 40.0  # roughly the ellipsoid-geoid separation: a gross bias

    full = from_origin(480_000, 6_230_100, 5.0, 5.0)
    write_tif(root / "test" / "u_north.tif", heights(full, (40, 40)), crs=UTM32, transform=full)
    spec = _spec(root, BASE.format(test="", ref=""))
    code, _, _ = cli("run", spec, "--out", tmp_path / "overlap")
    overlap = _summary(tmp_path / "overlap")
    (root / "test" / "u_north.tif").unlink()
    write_tif(root / "test" / "u_north.tif", heights(full, (20, 40)), crs=UTM32, transform=full)
    cli("run", spec, "--out", tmp_path / "cropped")
    cropped = _summary(tmp_path / "cropped")
    assert _tiles(overlap)["u_north"]["status"] == "ok"
    assert overlap["overall"]["count"] == cropped["overall"]["count"]
    # the geoid undulation is interpolated from a lattice laid over each tile: tiles of another
    # shape differ by micrometres
    assert overlap["overall"]["mean"] == pytest.approx(cropped["overall"]["mean"], abs=1e-5)
    assert any("u_north: 800 of 1,600 pixels in t_0_0" in c for c in overlap["cautions"])
    assert code == 0


# --- 5. a self-intersecting region ----------------------------------------------------------


def _lonlat_polygon(corners: list[tuple[float, float]]) -> dict:
    to_lonlat = Transformer.from_crs(UTM32, "EPSG:4326", always_xy=True)
    ring = [list(to_lonlat.transform(e, n)) for e, n in [*corners, corners[0]]]
    return {"type": "Polygon", "coordinates": [ring]}


def test_a_bow_tie_region_counts_both_lobes(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    # corners 1 m off the pixel lattice, so no pixel centre lies on an edge
    w, e, s, n = 480_051.0, 480_351.0, 6_229_651.0, 6_229_951.0
    mid = ((w + e) / 2, (s + n) / 2)
    shapes = {
        "BOW": _lonlat_polygon([(w, s), (e, n), (e, s), (w, n)]),  # the ring crosses itself
        "LEFT": _lonlat_polygon([(w, s), mid, (w, n)]),
        "RIGHT": _lonlat_polygon([(e, s), (e, n), mid]),
    }
    doc = {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": {"code": k}, "geometry": g} for k, g in shapes.items()
        ],
    }
    (root / "shapes.geojson").write_text(json.dumps(doc))
    spec = _spec(
        root, BASE.format(test="", ref="") + "region: {file: shapes.geojson, id_property: code}\n"
    )
    code, _, _ = cli("run", spec, "--out", tmp_path / "o")
    assert code == 0
    result = _summary(tmp_path / "o")
    count = {r["region"]: r["stats"]["count"] for r in result["regions"]}
    assert count["BOW"] == count["LEFT"] + count["RIGHT"] > 1_000
    assert any(
        "feature 0 of shapes.geojson (code 'BOW') was an invalid polygon (Self-intersection" in c
        and "into 2 polygons" in c
        for c in result["cautions"]
    )


# --- 9. region files that are not GeoJSON FeatureCollections --------------------------------


@pytest.mark.parametrize(
    ("name", "content", "message"),
    [
        (
            "regions.shp",
            b"\x00\x00\x27\x0a" + bytes(96),
            "region.file: regions.shp is a shapefile; expected a GeoJSON FeatureCollection "
            "(UTF-8 JSON text). Convert it first, e.g. 'ogr2ogr -f GeoJSON regions.geojson "
            "regions.shp' (GDAL)",
        ),
        (
            "bad.geojson",
            json.dumps({"type": "FeatureCollection", "features": ["WEST", "EAST"]}).encode(),
            "region.file: feature 0 of bad.geojson is a string, not a GeoJSON Feature object",
        ),
        (
            "bad.geojson",
            bytes(range(256)),
            "region.file: bad.geojson is not UTF-8 text (binary data, or text in another "
            "encoding); expected a GeoJSON FeatureCollection (UTF-8 JSON text)",
        ),
    ],
    ids=["shapefile", "features-not-objects", "binary"],
)
def test_a_region_file_that_is_not_geojson_is_bad_input(
    make_archive, cli, tmp_path, name, content, message
):
    root = make_archive(tiles=2, pixels=40)
    (root / name).write_bytes(content)
    spec = _spec(root, BASE.format(test="", ref="") + f"region: {{file: {name}}}\n")
    code, out, err = cli("run", spec, "--out", tmp_path / "o")
    assert code == 2
    assert err.strip() == f"demaudit: error: {message}"
    assert not (tmp_path / "o" / "summary.json").exists()


# --- 6. checkpoint files that cannot be used -------------------------------------------------


def _points(count: int = 12) -> list[tuple[str, float, float, float]]:
    """Points inside the tiny archive's test tiles with their orthometric heights (EGM96)."""
    rng = np.random.default_rng(3)
    e = rng.uniform(480_020, 480_380, count)
    n = rng.uniform(6_229_620, 6_229_980, count)
    return [(f"P{i}", e[i], n[i], float(terrain(e[i], n[i]))) for i in range(count)]


CHECKPOINT_SPEC = BASE + "checkpoints: {{file: {file}, vertical_crs: 'EPSG:5773'{extra}}}\n"


def test_renamed_checkpoint_columns_are_bad_input(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    rows = "".join(f"{p};{e:.3f};{n:.3f};{h:.3f}\n" for p, e, n, h in _points())
    (root / "checkpoints.csv").write_text("# horizontal_crs: EPSG:32632\nid;x;y;z\n" + rows)
    spec = _spec(root, CHECKPOINT_SPEC.format(test="", ref="", file="checkpoints.csv", extra=""))
    code, _, err = cli("run", spec, "--out", tmp_path / "o")
    assert code == 2
    assert err.strip() == (
        "demaudit: error: checkpoints.file: checkpoints.csv: no 'easting' / 'northing' / "
        "'height' column; found: id;x;y;z (delimiter ';'). Name the columns in "
        "checkpoints.x_column, y_column and height_column"
    )
    assert not (tmp_path / "o" / "summary.json").exists()


def test_checkpoints_without_a_crs_are_bad_input(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    rows = "".join(f"{p},{e:.3f},{n:.3f},{h:.3f}\n" for p, e, n, h in _points())
    (root / "cp.csv").write_text("id,easting,northing,height\n" + rows)
    spec = _spec(root, CHECKPOINT_SPEC.format(test="", ref="", file="cp.csv", extra=""))
    code, _, err = cli("run", spec, "--out", tmp_path / "o")
    assert code == 2
    assert err.strip() == (
        "demaudit: error: checkpoints.crs: cp.csv declares no horizontal CRS and the spec names "
        "none; add a line '# horizontal_crs: EPSG:<code>' to the file or set checkpoints.crs"
    )


@pytest.mark.slow
def test_semicolons_decimal_commas_and_latin1_read_like_plain_csv(make_archive, cli, tmp_path):
    root = make_archive(tiles=2, pixels=40, bias=0.25)
    points = _points()
    plain = "".join(f"{p},{e:.3f},{n:.3f},{h:.3f}\n" for p, e, n, h in points)
    (root / "plain.csv").write_text(
        "# horizontal_crs: EPSG:32632\nid,easting,northing,height\n" + plain, encoding="utf-8"
    )
    european = "".join(f"Ø{p};{e:.3f};{n:.3f};{h:.3f}\n".replace(".", ",") for p, e, n, h in points)
    (root / "european.csv").write_bytes(
        ("# horizontal_crs: EPSG:32632\nid;easting;northing;height\n" + european).encode("latin-1")
    )
    results = {}
    for name in ("plain", "european"):
        spec = _spec(
            root,
            CHECKPOINT_SPEC.format(test="", ref="", file=f"{name}.csv", extra=""),
            f"{name}.yaml",
        )
        code, _, _ = cli("run", spec, "--out", tmp_path / name)
        assert code == 0
        results[name] = _summary(tmp_path / name)["checkpoints"]
    assert (
        results["european"]["counts"]["used"] == len(points) == results["plain"]["counts"]["used"]
    )
    assert results["european"]["stats"]["rmse"] == pytest.approx(results["plain"]["stats"]["rmse"])
    # the test tiles carry a bias of 0.25 m over the reference terrain the points lie on
    assert results["plain"]["stats"]["median"] == pytest.approx(0.25, abs=0.05)
