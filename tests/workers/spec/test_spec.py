"""The job spec contract: validation messages name the field; paths resolve."""

from __future__ import annotations

from pathlib import Path

import pytest

from demaudit.workers.errors import DataRootError, SpecError
from demaudit.workers.spec import load_spec_file, parse_spec, resolve


def minimal(**overrides) -> dict:
    spec = {
        "name": "release-2026-11",
        "test": {"tiles": "test/*.tif", "vertical_crs": "ellipsoidal", "units": "metre"},
        "reference": {"tiles": "ref", "vertical_crs": "EPSG:5773", "units": "metre"},
        "region": {"file": "provinces.geojson", "id_property": "code"},
        "options": {"resampling": "bilinear"},
    }
    spec.update(overrides)
    return spec


@pytest.fixture
def tree(tmp_path: Path) -> Path:
    for folder, names in {"test": ["a.tif", "b.tif"], "ref": ["r.tif"]}.items():
        (tmp_path / folder).mkdir()
        for name in names:
            (tmp_path / folder / name).write_bytes(b"")
    (tmp_path / "provinces.geojson").write_text("{}")
    return tmp_path


def test_valid_spec_resolves_relative_to_base(tree: Path):
    job = resolve(parse_spec(minimal()), base_dir=tree)
    assert [p.name for p in job.test_tiles] == ["a.tif", "b.tif"]
    assert [p.name for p in job.reference_tiles] == ["r.tif"]
    assert job.region_file == tree / "provinces.geojson"


def test_list_of_paths(tree: Path):
    spec = minimal(test={"tiles": ["test/b.tif", "test/a.tif"]})
    job = resolve(parse_spec(spec), base_dir=tree)
    assert [p.name for p in job.test_tiles] == ["b.tif", "a.tif"]


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"test": {"tiles": "x", "units": "furlong"}}, "test.units"),
        ({"reference": {"tiles": "x", "vertical_crs": "EPSG:99999999"}}, "reference.vertical_crs"),
        ({"reference": {"tiles": "x", "vertical_crs": "EPSG:32632"}}, "reference.vertical_crs"),
        ({"options": {"resampling": "magic"}}, "options.resampling"),
        ({"colour": "blue"}, "colour"),
        ({"test": {"tiles": "x", "unit": "metre"}}, "test.unit"),
        ({"name": "../etc"}, "name"),
    ],
)
def test_invalid_values_name_the_field(change: dict, field: str):
    with pytest.raises(SpecError, match=field.replace(".", r"\.")):
        parse_spec(minimal(**change))


def test_units_must_agree_with_a_vertical_crs_in_feet():
    # EPSG:6360 is NAVD88 height (ftUS): declaring metres is inconsistent.
    with pytest.raises(SpecError, match="reference"):
        parse_spec(minimal(reference={"tiles": "x", "vertical_crs": "EPSG:6360", "units": "metre"}))
    parse_spec(
        minimal(reference={"tiles": "x", "vertical_crs": "EPSG:6360", "units": "us_survey_foot"})
    )


def test_missing_files_are_named(tree: Path):
    with pytest.raises(SpecError, match=r"test\.tiles.*matches no tiles"):
        resolve(parse_spec(minimal(test={"tiles": "test/*.vrt"})), base_dir=tree)
    with pytest.raises(SpecError, match=r"reference\.tiles: no such file"):
        resolve(parse_spec(minimal(reference={"tiles": "nowhere.tif"})), base_dir=tree)
    with pytest.raises(SpecError, match=r"region\.file"):
        resolve(parse_spec(minimal(region={"file": "nope.geojson"})), base_dir=tree)


def test_paths_outside_data_roots_are_refused(tree: Path, tmp_path_factory):
    elsewhere = tmp_path_factory.mktemp("other")
    with pytest.raises(DataRootError, match="outside the allowed data roots"):
        resolve(parse_spec(minimal()), base_dir=tree, data_roots=[elsewhere])
    resolve(parse_spec(minimal()), base_dir=tree, data_roots=[tree])


def test_yaml_and_json_files(tmp_path: Path):
    (tmp_path / "a.yaml").write_text("name: x\ntest: {tiles: t}\nreference: {tiles: r}\n")
    assert parse_spec(load_spec_file(tmp_path / "a.yaml")).name == "x"
    (tmp_path / "b.json").write_text(
        '{"name": "y", "test": {"tiles": "t"}, "reference": {"tiles": "r"}}'
    )
    assert parse_spec(load_spec_file(tmp_path / "b.json")).name == "y"
    (tmp_path / "c.yaml").write_text("name: [unclosed\n")
    with pytest.raises(SpecError, match="not valid YAML"):
        load_spec_file(tmp_path / "c.yaml")
    with pytest.raises(SpecError, match="must be a mapping"):
        parse_spec(["not", "a", "mapping"])  # type: ignore[arg-type]


def test_symlinked_tile_leading_outside_the_roots_is_refused(tree: Path, tmp_path_factory):
    outside = tmp_path_factory.mktemp("outside") / "secret.tif"
    outside.write_bytes(b"")
    (tree / "test" / "link.tif").symlink_to(outside)
    with pytest.raises(DataRootError, match="link.tif leads outside"):
        resolve(parse_spec(minimal()), base_dir=tree, data_roots=[tree])


# --- bounds and unusable paths (issue 17) ------------------------------------------------------


@pytest.mark.parametrize(
    ("tiles", "why"),
    [
        ("test/a\x00.tif", "control characters"),
        ("test/" + "a" * 2000, "2,005 characters"),
        (["test/a.tif"] * 1001, "1 to 1,000 paths"),
        ([f"test/{i}*.tif" for i in range(101)], "at most 100 glob patterns"),
    ],
)
def test_path_bounds_are_spec_errors_naming_the_field(tiles, why):
    with pytest.raises(SpecError, match=r"test\.tiles: ") as refused:
        parse_spec(minimal(test={"tiles": tiles}))
    assert why in str(refused.value)


def test_an_unknown_user_and_an_over_long_name_are_spec_errors(tree: Path):
    with pytest.raises(SpecError, match=r"test\.tiles: cannot expand '~nosuchuser'"):
        resolve(parse_spec(minimal(test={"tiles": "~nosuchuser/a.tif"})), base_dir=tree)
    with pytest.raises(SpecError, match=r"region\.file: "):
        resolve(parse_spec(minimal(region={"file": "x" * 300 + ".geojson"})), base_dir=tree)


def test_globs_expand_as_glob_does_and_the_file_budget_stops_listing(tree: Path, monkeypatch):
    import glob

    from demaudit.workers.spec import resolution

    (tree / "test" / ".hidden.tif").write_bytes(b"")
    patterns = ["test/*.tif", "test/.*.tif", "test/[ab].tif", "*/a.tif"]
    for pattern in patterns:
        job = resolve(parse_spec(minimal(test={"tiles": pattern})), base_dir=tree)
        # glob.glob is the reference for what a pattern matches
        assert list(job.test_tiles) == sorted(Path(p) for p in glob.glob(str(tree / pattern)))
    monkeypatch.setattr(resolution, "MAX_FILES_PER_FIELD", 1)
    with pytest.raises(SpecError, match=r"test\.tiles: the patterns and folders list more than 1"):
        resolve(parse_spec(minimal(test={"tiles": ["test/a.tif", "test/*.tif"]})), base_dir=tree)


def test_a_resolved_job_keeps_its_roots_and_shows_paths_relative_to_them(tree: Path):
    job = resolve(parse_spec(minimal()), base_dir=tree, data_roots=[tree])
    assert job.data_roots == (str(tree.resolve()),)
    assert job.shown(job.test_tiles[0]) == "test/a.tif"
    assert resolve(parse_spec(minimal()), base_dir=tree).data_roots is None


def test_catalog_anchors_are_the_data_roots_else_the_spec_folder(tree: Path, tmp_path: Path):
    """catalog.json names tiles relative to these folders (workers/inputs/catalog_file.py)."""
    spec = parse_spec(minimal())
    assert resolve(spec, base_dir=tree).anchors == (str(tree.resolve()),)
    roots = resolve(spec, base_dir=tree, data_roots=[tmp_path / "elsewhere", tree])
    assert roots.anchors == (str((tmp_path / "elsewhere").resolve()), str(tree.resolve()))
