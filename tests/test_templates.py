"""ROI templates: schema validation, shipped geometry, geometric checks, lookup by name."""

import math

import numpy as np
import pytest
import yaml

from phantometry.errors import TemplateError
from phantometry.phantoms import check_template, load_template
from phantometry.templates import builtin_template_dir, list_templates, template_from_dict


@pytest.fixture()
def iec():
    return load_template("iec-body")


def test_iec_body_spheres_match_published_diameters(iec):
    # NEMA NU 2 / IEC 61675-1 body phantom: inner diameters 10, 13, 17, 22, 28, 37 mm
    assert [s.diameter_mm for s in iec.spheres] == [10, 13, 17, 22, 28, 37]
    assert [s.name for s in iec.spheres] == [f"sphere_{d}mm" for d in (10, 13, 17, 22, 28, 37)]
    # published volumes 0.52, 1.15, 2.57, 5.57, 11.49, 26.52 mL (4/3 pi r^3)
    assert [s.volume_ml for s in iec.spheres] == pytest.approx([0.52, 1.15, 2.57, 5.57, 11.49, 26.52], abs=0.006)
    assert all(s.wall_mm == 1 for s in iec.spheres)  # 1 mm walls (recalled)


def test_iec_body_ring_geometry(iec):
    # centres 60 degrees apart on a 57.2 mm circle about the insert axis (recalled)
    angles = sorted(math.degrees(math.atan2(s.centre_mm[1], s.centre_mm[0])) % 360 for s in iec.spheres)
    assert np.diff(angles) == pytest.approx([60.0] * 5, abs=0.01)
    assert all(math.hypot(*s.centre_mm[:2]) == pytest.approx(57.2, abs=0.01) for s in iec.spheres)


def test_iec_body_cross_section(iec):
    # 294 mm wide, 224 mm high (147 mm half-circle over 140 mm + 2 x 77 mm corners; recalled)
    outline = iec.body.outline_xy()
    assert np.ptp(outline[:, 0]) == pytest.approx(294.0, abs=0.01)
    assert np.ptp(outline[:, 1]) == pytest.approx(224.0, abs=0.01)


@pytest.mark.parametrize("name", ["iec-body", "small-animal"])
def test_edge_distance_matches_a_dense_outline(name):
    # The closed-form distance to the outline against brute force: the nearest of 40 000 points
    # of the outline (mathematics; the outline points lie on the boundary, 0.02 mm apart or less).
    tpl = load_template(name)
    body = tpl.body
    h = body.half_extent_xy_mm
    rng = np.random.default_rng(5)
    xy = rng.uniform(-h, h, (4000, 2))
    inside = body.inside_xy(xy[:, 0], xy[:, 1])
    xy = xy[inside]
    outline = body.outline_xy(40_000)
    brute = np.min(np.linalg.norm(xy[:, None, :] - outline[None, ::4], axis=-1), axis=1)
    analytic = body.edge_distance_xy(xy[:, 0], xy[:, 1])
    assert analytic == pytest.approx(brute, abs=0.05)
    assert np.all(body.edge_distance_xy(np.array([2 * h]), np.array([0.0])) < 0)


def test_iec_body_background_set(iec):
    bg = iec.background
    assert len(bg.centres_xy_mm) == 12 and bg.slice_offsets_mm == [-20, -10, 0, 10, 20]
    assert bg.n_rois == 60  # NEMA NU 2: K = 60 background ROIs per size
    assert bg.diameters_mm == [10, 13, 17, 22, 28, 37]
    assert check_template(iec) == []


def test_check_finds_roi_too_close_to_sphere(iec):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    data["background"]["centres_xy_mm"][0] = [-28.6, 10.0]  # between the 37 mm and the 13 mm sphere
    problems = check_template(template_from_dict(data, check=False))
    assert any("centres_xy_mm[0]" in p and "sphere" in p for p in problems)


def test_check_finds_insert_outside_body(iec):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    data["inserts"][0]["centre_mm"] = [0, 140, 0]
    problems = check_template(template_from_dict(data, check=False))
    assert any("inserts[0]" in p and "outside the body" in p for p in problems)


def test_check_finds_overlapping_inserts(iec):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    data["inserts"][1]["centre_mm"] = [-20.0, 49.5, 0]  # 28 mm sphere onto the 37 mm one
    problems = check_template(template_from_dict(data, check=False))
    assert any("overlap" in p for p in problems)


@pytest.mark.parametrize(
    "mutate, key",
    [
        (lambda d: d["inserts"][0].update(shape="cube"), "inserts.0.shape"),
        (lambda d: d["inserts"][0].pop("diameter_mm"), "inserts.0.diameter_mm"),
        (lambda d: d["inserts"][0].update(diameter_mm=-3), "inserts.0.diameter_mm"),
        (lambda d: d.update(colour="red"), "colour"),
        (lambda d: d["analysis"].update(axis_insert="nope"), "axis_insert"),
        (lambda d: d["body"].update(flat_width_mm=100), "body"),
    ],
)
def test_bad_template_names_file_and_key(tmp_path, iec, mutate, key):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    mutate(data)
    p = tmp_path / "bad.yaml"
    p.write_text(yaml.safe_dump(data))
    with pytest.raises(TemplateError) as ei:
        load_template(p)
    msg = str(ei.value)
    assert str(p) in msg and key in msg and "\n" not in msg


def test_unknown_template_lists_choices():
    with pytest.raises(TemplateError, match="available: .*iec-body"):
        load_template("no-such-phantom")


def test_invalid_yaml_reports_line(tmp_path):
    p = tmp_path / "broken.yaml"
    p.write_text("name: [unclosed\n")
    with pytest.raises(TemplateError, match="broken.yaml: not valid YAML"):
        load_template(p)


def test_user_template_folder_found_by_name(tmp_path, monkeypatch, iec):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    data["name"] = "site-body"
    (tmp_path / "site-body.yaml").write_text(yaml.safe_dump(data))
    assert "site-body" not in list_templates()
    assert load_template("site-body", [tmp_path]).name == "site-body"
    monkeypatch.setenv("PHANTOMETRY_TEMPLATES", str(tmp_path))
    assert load_template("site-body").name == "site-body"


def test_builtin_templates_are_packaged():
    assert (builtin_template_dir() / "iec-body.yaml").is_file()


def test_geometric_checks_run_on_every_load(tmp_path, iec):
    """The checks of `templates check` also refuse a template given to measure (by file or name)."""
    data = iec.model_dump(mode="json", exclude={"source_path"})
    small = next(i for i in data["inserts"] if i["name"] == "sphere_10mm")
    small["centre_mm"] = next(i for i in data["inserts"] if i["name"] == "sphere_37mm")["centre_mm"]
    data["name"] = "overlapping"
    path = tmp_path / "overlapping.yaml"
    path.write_text(yaml.safe_dump(data))
    for ref, dirs in ((path, None), ("overlapping", [tmp_path])):
        with pytest.raises(TemplateError) as ei:
            load_template(ref, dirs)
        msg = str(ei.value)
        assert msg.startswith(f"{path}: ") and "geometric problem(s)" in msg
        assert "inserts sphere_37mm and sphere_10mm: overlap" in msg or "inserts sphere_10mm and sphere_37mm: overlap" in msg
    # the checks can still be asked for as a list
    assert check_template(template_from_dict(data, check=False))


@pytest.mark.parametrize(
    "change, needle",
    [
        (lambda d: d["inserts"][0].update(diameter_mm=float("nan")), "inserts.0.diameter_mm: Input should be a finite number"),
        (lambda d: d["inserts"][0].update(centre_mm=[float("inf"), 0, 0]), "inserts.0.centre_mm.0: Input should be a finite number"),
        (lambda d: d["inserts"][0].update(diameter_mm=1e300), "inserts.0.diameter_mm: 100000 or more is far beyond any phantom"),
    ],
)
def test_numbers_that_are_not_sizes_refused(iec, change, needle):
    data = iec.model_dump(mode="json", exclude={"source_path"})
    change(data)
    with pytest.raises(TemplateError) as ei:
        template_from_dict(data, source="t.yaml")
    assert needle in str(ei.value) and str(ei.value).startswith("t.yaml: ")


def test_fillable_names(iec):
    assert set(iec.fillable_names) == {s.name for s in iec.spheres}  # the lung insert is fill: cold
    assert "lung_insert" not in iec.fillable_names
