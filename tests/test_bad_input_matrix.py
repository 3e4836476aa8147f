"""Bad input, as a user or an attacker gives it, through the installed console script.

Each case of the matrix copies a small synthetic scan (made once per module by
phantometry.synth, 4 mm voxels) into its own folder, damages one input (a fill record, a
template, a band set, DICOM slices with pydicom, a NIfTI file with nibabel's header layout, a
sidecar or an environment variable) and runs ``phantometry`` as a subprocess. Every case must
end the same way: exit code 2, exactly one line on stderr, starting ``phantometry: error:`` and
naming the offending file, no traceback, nothing on stdout, no result folder or any other file
written, and every input file unchanged byte for byte.

Then a bounded fuzz of header bytes (seeded, 200 cases in-process through the loaders, a few
through the console script) accepts only the project's own errors or a successful load.

NIfTI-1 header offsets used below (dim at byte 40, datatype 70, pixdim 76, vox_offset 108,
srow_x 280) are those of the NIfTI-1 standard header (nifti1.h, NIfTI Data Format Working
Group).
"""

from __future__ import annotations

import gzip
import hashlib
import json
import os
import random
import shutil
import struct
import subprocess
import sys
import warnings
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pydicom
import pytest
import yaml

from phantometry.errors import PhantometryError
from phantometry.io.dicom import load_dicom
from phantometry.io.nifti import load_nifti
from phantometry.synth import SynthSpec, synthesize, write_synthetic
from phantometry.templates import builtin_template_dir

SCRIPT = Path(sys.executable).parent / "phantometry"
ENV = dict(os.environ, MPLBACKEND="Agg", COLUMNS="100")


# ============================================================================ shared inputs
@pytest.fixture(scope="module")
def src(tmp_path_factory) -> Path:
    """One synthetic scan as DICOM (55 slices of 101 x 101) and NIfTI, with its fill record."""
    base = tmp_path_factory.mktemp("bad_input_src")
    result = synthesize(SynthSpec(voxel_mm=(4.0, 4.0, 4.0), noise_cv=0.05, seed=3))
    write_synthetic(result, base, "dicom")
    write_synthetic(result, base / "nifti", "nifti")
    tpl = builtin_template_dir()
    shutil.copy(tpl / "iec-body.yaml", base / "iec-body.yaml")
    shutil.copy(tpl / "bands" / "eanm-fdg-2015.yaml", base / "eanm-fdg-2015.yaml")
    return base


def _snapshot(folder: Path) -> dict[str, str]:
    """Every file (sha256) and folder under ``folder``, hidden ones included."""
    out = {}
    for p in sorted(folder.rglob("*")):
        rel = str(p.relative_to(folder))
        out[rel] = "folder" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


# ============================================================================ case builders
@dataclass
class Case:
    """A bad input: ``build(case_dir, src)`` prepares the inputs and returns (argv, offending)."""

    id: str
    build: Callable[[Path, Path], tuple[list[str], str]]
    env: dict | None = None


def _measure(case: Path, image: Path, *extra: str, fill: Path | None = None) -> list[str]:
    return ["measure", str(image), "--fill", str(fill or case / "fill.yaml"), "--out", str(case / "results"), *extra]


def _copy_dicom(case: Path, src: Path) -> Path:
    shutil.copytree(src / "dicom", case / "dicom")
    shutil.copy(src / "fill.yaml", case / "fill.yaml")
    return case / "dicom"


def _edit_dicom(path: Path, edit: Callable[[pydicom.Dataset], None]) -> None:
    with warnings.catch_warnings():  # pydicom warns about the invalid values these cases write
        warnings.simplefilter("ignore")
        ds = pydicom.dcmread(path)
        edit(ds)
        ds.save_as(path, enforce_file_format=False)


def dicom(case_id: str, edit: Callable[[pydicom.Dataset], None], which: str = "one", command: str = "measure",
          extra: tuple[str, ...] = ()) -> Case:
    """A DICOM case: ``edit`` applied to one slice (PT_0010.dcm) or to every slice."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        files = sorted(folder.glob("*.dcm")) if which == "all" else [folder / "PT_0010.dcm"]
        for f in files:
            _edit_dicom(f, edit)
        argv = _measure(case, folder, *extra) if command == "measure" else [command, str(folder)]
        return argv, str(files[0] if which == "one" else folder)

    return Case(case_id, build)


def dicom_bytes(case_id: str, cut: Callable[[bytes], bytes]) -> Case:
    """A DICOM case: the bytes of one slice replaced by ``cut(bytes)``."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        victim = folder / "PT_0010.dcm"
        victim.write_bytes(cut(victim.read_bytes()))
        return _measure(case, folder), str(victim)

    return Case(case_id, build)


def fill(case_id: str, content: str | bytes | Callable[[dict], object], image: str = "dicom") -> Case:
    """A fill-record case: raw text/bytes, or a function of the good record's mapping."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        target = case / "fill.yaml"
        if image == "dicom":
            folder = _copy_dicom(case, src)
        else:
            shutil.copytree(src / "nifti", case / "nifti")
            folder = case / "nifti" / "phantom.nii.gz"
            shutil.copy(src / "fill.yaml", target)
        if callable(content):
            record = yaml.safe_load((src / "fill.yaml").read_text(encoding="utf-8"))
            changed = content(record)
            text = changed if isinstance(changed, str) else yaml.safe_dump(record, sort_keys=False)
            target.write_text(text, encoding="utf-8")
        elif isinstance(content, bytes):
            target.write_bytes(content)
        else:
            target.write_text(content, encoding="utf-8")
        return _measure(case, folder), str(target)

    return Case(case_id, build)


def _good_fill_text(src: Path) -> str:
    return (src / "fill.yaml").read_text(encoding="utf-8")


def fill_text(case_id: str, change: Callable[[str], str | bytes]) -> Case:
    """A fill-record case made from the good record's text."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        _copy_dicom(case, src)
        new = change(_good_fill_text(src))
        target = case / "fill.yaml"
        target.write_bytes(new if isinstance(new, bytes) else new.encode("utf-8"))
        return _measure(case, case / "dicom"), str(target)

    return Case(case_id, build)


def template(case_id: str, change: Callable[[str], str | bytes], command: str = "measure") -> Case:
    """A template case: the built-in iec-body template's text changed, given with --template."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        target = case / "my-body.yaml"
        new = change((src / "iec-body.yaml").read_text(encoding="utf-8"))
        target.write_bytes(new if isinstance(new, bytes) else new.encode("utf-8"))
        if command == "measure":
            return _measure(case, folder, "--template", str(target)), str(target)
        return ["templates", command, str(target)], str(target)

    return Case(case_id, build)


def template_data(case_id: str, change: Callable[[dict], None]) -> Case:
    def text(t: str) -> str:
        data = yaml.safe_load(t)
        change(data)
        return yaml.safe_dump(data, sort_keys=False)

    return template(case_id, text)


def bands(case_id: str, change: Callable[[str], str | bytes], command: str = "measure") -> Case:
    """A band-set case: the shipped eanm-fdg-2015 set's text changed, given with --bands."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        target = case / "eanm-fdg-2015.yaml"
        new = change((src / "eanm-fdg-2015.yaml").read_text(encoding="utf-8"))
        target.write_bytes(new if isinstance(new, bytes) else new.encode("utf-8"))
        if command == "measure":
            return _measure(case, folder, "--bands", str(target)), str(target)
        return ["bands", "show", str(target)], str(target)

    return Case(case_id, build)


def _nifti_raw(src: Path) -> bytes:
    return gzip.decompress((src / "nifti" / "phantom.nii.gz").read_bytes())


def nifti(case_id: str, change: Callable[[bytearray], bytes | bytearray], suffix: str = ".nii.gz", gz_bytes: bool = False,
          command: str = "measure") -> Case:
    """A NIfTI case: the decompressed file's bytes changed, written as ``suffix``.

    With ``gz_bytes`` the change applies to the compressed bytes of the ``.nii.gz`` instead.
    """

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        shutil.copy(src / "fill.yaml", case / "fill.yaml")
        image = case / f"phantom{suffix}"
        shutil.copy(src / "nifti" / "phantom.json", case / "phantom.json")
        if gz_bytes:
            image.write_bytes(bytes(change(bytearray((src / "nifti" / "phantom.nii.gz").read_bytes()))))
        else:
            data = bytes(change(bytearray(_nifti_raw(src))))
            image.write_bytes(gzip.compress(data, compresslevel=1) if suffix.endswith(".gz") else data)
        argv = _measure(case, image) if command == "measure" else [command, str(image)]
        return argv, str(image)

    return Case(case_id, build)


def sidecar(case_id: str, content: str | bytes) -> Case:
    def build(case: Path, src: Path) -> tuple[list[str], str]:
        shutil.copy(src / "fill.yaml", case / "fill.yaml")
        image = case / "phantom.nii.gz"
        shutil.copy(src / "nifti" / "phantom.nii.gz", image)
        target = case / "phantom.json"
        target.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
        return _measure(case, image), str(target)

    return Case(case_id, build)


def _pack(fmt: str, offset: int, *values) -> Callable[[bytearray], bytearray]:
    def change(b: bytearray) -> bytearray:
        struct.pack_into(fmt, b, offset, *values)
        return b

    return change


def _header_only(dims: tuple[int, ...]) -> Callable[[bytearray], bytes]:
    """A 352-byte NIfTI (header and extension flag, no voxels) claiming ``dims``."""

    def change(b: bytearray) -> bytes:
        struct.pack_into("<8h", b, 40, len(dims), *dims, *([1] * (7 - len(dims))))
        return bytes(b[:352])

    return change


def _set_item(keyword: str, value) -> Callable[[pydicom.Dataset], None]:
    def edit(ds: pydicom.Dataset) -> None:
        setattr(ds.RadiopharmaceuticalInformationSequence[0], keyword, value)

    return edit


def _set(**values) -> Callable[[pydicom.Dataset], None]:
    def edit(ds: pydicom.Dataset) -> None:
        for k, v in values.items():
            if v is None:
                delattr(ds, k)
            else:
                setattr(ds, k, v)

    return edit


def _set_meta(keyword: str, value) -> Callable[[pydicom.Dataset], None]:
    def edit(ds: pydicom.Dataset) -> None:
        setattr(ds.file_meta, keyword, value)

    return edit


def _deep_flow(depth: int) -> str:
    return "[" * depth + "]" * depth


def _deep_block(depth: int) -> str:
    return "".join(f"{'  ' * i}k{i}:\n" for i in range(depth)) + "  " * depth + "leaf: 1\n"


def _dup_ratio(text: str) -> str:
    assert "  ratio_to_background: 4.0\n" in text
    return text.replace("  ratio_to_background: 4.0\n", "  ratio_to_background: 4.0\n  ratio_to_background: 8.0\n")


def _gml(decay_correction: str | None, **extra) -> Callable[[pydicom.Dataset], None]:
    def edit(ds: pydicom.Dataset) -> None:
        ds.Units = "GML"
        if decay_correction is None:
            del ds.DecayCorrection
        else:
            ds.DecayCorrection = decay_correction
        for k, v in extra.items():
            setattr(ds.RadiopharmaceuticalInformationSequence[0], k, v)

    return edit


def _template_overlap(d: dict) -> None:
    small = next(i for i in d["inserts"] if i["name"] == "sphere_10mm")
    big = next(i for i in d["inserts"] if i["name"] == "sphere_37mm")
    small["centre_mm"] = list(big["centre_mm"])  # sphere_10mm placed on sphere_37mm


def _template_outside(d: dict) -> None:
    d["inserts"][0]["centre_mm"] = [0, 140, 0]


def _template_set(path: tuple, value) -> Callable[[dict], None]:
    def change(d: dict) -> None:
        target = d
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value

    return change


def _bg(**values) -> Callable[[dict], None]:
    def change(r: dict) -> None:
        r["background"].update(values)

    return change


def _syringe_background(volume_ml: float, syringe_at: str = "2026-11-03T09:30:00+01:00") -> Callable[[dict], None]:
    def change(r: dict) -> None:
        r["background"] = {
            "syringe_mbq": 80.0,
            "syringe_measured_at": syringe_at,
            "residual_mbq": 2.0,
            "residual_measured_at": "2026-11-03T09:40:00+01:00",
            "volume_ml": volume_ml,
        }

    return change


def _gzip_cut(b: bytearray) -> bytes:
    return bytes(b[: len(b) // 2])


def _gzip_corrupt(b: bytearray) -> bytes:
    middle = len(b) // 2
    return bytes(b[:middle] + bytes(4000) + b[middle + 4000:])


def option(case_id: str, extra: tuple[str, ...], offending: str) -> Case:
    """A good scan and fill record with a bad command-line option (``offending`` named)."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        return _measure(case, folder, *extra), offending

    return Case(case_id, build)


def _frame_none(ds: pydicom.Dataset) -> None:
    ds.DecayCorrection = "NONE"
    if "ActualFrameDuration" in ds:
        del ds.ActualFrameDuration


CASES: list[Case] = [
    # site time, decay semantics, fill-record uncertainties (issue 16)
    option("cli-timezone-unknown", ("--timezone", "Mars/Olympus"), "Mars/Olympus"),
    fill("fill-timezone-unknown", lambda r: r.update(timezone="Mars/Olympus")),
    fill("fill-after-the-scan", _bg(measured_at="2026-11-03T11:30:00+01:00")),
    fill("fill-uncertainty-negative", lambda r: r.update(uncertainty={"activity_pct": -2})),
    fill("fill-uncertainty-unknown-key", lambda r: r.update(uncertainty={"volume_ml": 5})),
    dicom("dicom-none-without-frame-duration", _frame_none, which="all"),
    # ------------------------------------------------------------------ fill records
    fill_text("fill-utf16", lambda t: t.encode("utf-16")),
    fill_text("fill-utf16-no-bom", lambda t: t.encode("utf-16-le")),
    fill_text("fill-utf32", lambda t: t.encode("utf-32")),
    fill_text("fill-latin1", lambda t: (t + "operator_note: filled by Ren\u00e9e\n").encode("latin-1")),
    fill_text("fill-binary", lambda t: bytes(random.Random(1).randrange(256) for _ in range(600))),
    fill_text("fill-control-char", lambda t: t + "operator_note: a\x01b\n"),
    fill_text("fill-deep-flow", lambda t: t + f"operator_note: {_deep_flow(3000)}\n"),
    fill_text("fill-deep-block", lambda t: t + "operator_note:\n" + "".join("  " + line + "\n" for line in _deep_block(300).splitlines())),
    fill_text("fill-duplicate-ratio", _dup_ratio),
    fill_text("fill-duplicate-background", lambda t: t + "background:\n  concentration_kbq_ml: 1.0\n  measured_at: '2026-11-03T09:40:00+01:00'\n"),
    fill_text("fill-impossible-date", lambda t: t.replace("2026-11-03T09:40:00+01:00", "2026-13-45T09:40:00+01:00").replace("'", "")),
    fill_text("fill-year-0", lambda t: t.replace("'2026-11-03T09:40:00+01:00'", "0000-01-01T09:40:00+01:00")),
    fill_text("fill-offset-25h", lambda t: t.replace("'2026-11-03T09:40:00+01:00'", "2026-11-03T09:40:00+25:00")),
    fill_text("fill-huge-integer", lambda t: t + "operator_note: " + "9" * 5000 + "\n"),
    fill_text("fill-larger-than-4mb", lambda t: t + "# " + "x" * (5 * 1024 * 1024) + "\n"),
    fill_text("fill-empty", lambda t: ""),
    fill_text("fill-a-list", lambda t: "- nuclide: F-18\n"),
    fill("fill-measured-1900", _bg(measured_at="1900-01-01T09:40:00+01:00")),
    fill("fill-measured-2030", _bg(measured_at="2030-11-03T09:40:00+01:00")),
    fill("fill-measured-9999", _bg(measured_at="9999-12-31T23:00:00-05:00")),
    fill("fill-measured-year-1", _bg(measured_at="0001-01-01T00:10:00+05:00")),
    fill("fill-measured-1900-nifti", _bg(measured_at="1900-01-01T09:40:00+01:00"), image="nifti"),
    fill("fill-concentration-1e308", _bg(concentration_kbq_ml=1e308)),
    fill("fill-concentration-1e-300", _bg(concentration_kbq_ml=1e-300)),
    fill("fill-concentration-inf", lambda r: _good_yaml(r).replace("concentration_kbq_ml: 7.267656", "concentration_kbq_ml: .inf")),
    fill("fill-concentration-nan", lambda r: _good_yaml(r).replace("concentration_kbq_ml: 7.267656", "concentration_kbq_ml: .nan")),
    fill("fill-syringe-volume-1e-308", _syringe_background(1e-308)),
    fill("fill-syringe-gap-1900", _syringe_background(9700.0, syringe_at="1900-01-01T09:30:00+01:00")),
    fill("fill-ratio-1e308", lambda r: r["spheres"].update(ratio_to_background=1e308)),
    fill("fill-insert-measured-9999", lambda r: r.update(inserts={"sphere_10mm": {"concentration_kbq_ml": 20.0, "measured_at": "9999-01-01T00:00:00+00:00"}})),
    fill("fill-cold-unknown", lambda r: r.update(cold=["sphere_99mm"])),
    fill("fill-inserts-unknown", lambda r: r.update(inserts={"sphere_99mm": {"ratio_to_background": 8.0}})),
    fill("fill-inserts-not-fillable", lambda r: r.update(inserts={"lung_insert": {"ratio_to_background": 2.0}})),
    fill("fill-unknown-nuclide", lambda r: r.update(nuclide="Xx-999")),
    # ------------------------------------------------------------------ templates
    template_data("template-sphere-on-sphere", _template_overlap),
    template_data("template-insert-outside-body", _template_outside),
    template("template-duplicate-key", lambda t: t + "title: a second title\n"),
    template("template-utf16", lambda t: t.encode("utf-16")),
    template("template-latin1", lambda t: ("# Ren\u00e9e\n" + t).encode("latin-1")),
    template("template-deep", lambda t: t + f"notes2: {_deep_flow(2000)}\n"),
    template_data("template-nan-diameter", lambda d: d["inserts"][0].update(diameter_mm=float("nan"))),
    template_data("template-inf-centre", lambda d: d["inserts"][0].update(centre_mm=[float("inf"), 0, 0])),
    template_data("template-huge-diameter", lambda d: d["inserts"][0].update(diameter_mm=1e300)),
    template("template-check-duplicate-key", lambda t: t + "title: a second title\n", command="check"),
    template_data("template-clearance", _template_set(("background", "min_clearance_mm"), 80.0)),
    # ------------------------------------------------------------------ band sets
    bands("bands-duplicate-key", lambda t: t.replace("{roi: sphere_37mm, metric: rc_mean, low: 0.76, high: 0.89}",
                                                      "{roi: sphere_37mm, metric: rc_mean, low: 0.76, high: 0.89, low: 0.1}")),
    bands("bands-utf16", lambda t: t.encode("utf-16")),
    bands("bands-deep", lambda t: t + f"deep: {_deep_flow(2000)}\n"),
    bands("bands-nan-limit", lambda t: t.replace("low: 0.76", "low: .nan")),
    bands("bands-show-duplicate-key", lambda t: t + "title: again\n", command="show"),
    # ------------------------------------------------------------------ DICOM geometry
    dicom("dicom-position-nan", _set(ImagePositionPatient=["nan", "0", "0"])),
    dicom("dicom-position-inf", _set(ImagePositionPatient=["0", "-inf", "0"])),
    dicom("dicom-position-1e300", _set(ImagePositionPatient=["0", "0", "1e300"])),
    dicom("dicom-orientation-nan", _set(ImageOrientationPatient=["nan", "0", "0", "0", "1", "0"]), which="all"),
    dicom("dicom-spacing-nan", _set(PixelSpacing=["nan", "4"]), which="all"),
    dicom("dicom-spacing-inf", _set(PixelSpacing=["4", "inf"]), which="all"),
    dicom("dicom-spacing-1e300", _set(PixelSpacing=["1e300", "1e300"]), which="all"),
    dicom("dicom-position-nan-info", _set(ImagePositionPatient=["nan", "0", "0"]), command="info"),
    # ------------------------------------------------------------------ DICOM encoding and pixels
    dicom("dicom-transfer-syntax-unknown-all", _set_meta("TransferSyntaxUID", "1.2.3.4.5"), which="all"),
    dicom("dicom-transfer-syntax-unknown-one", _set_meta("TransferSyntaxUID", "1.2.3.4.5")),
    dicom("dicom-rescale-intercept-nan", _set(RescaleIntercept="nan")),
    dicom("dicom-rescale-slope-nan", _set(RescaleSlope="nan")),
    dicom("dicom-rescale-slope-inf", _set(RescaleSlope="inf")),
    dicom("dicom-rescale-slope-zero", _set(RescaleSlope="0")),
    dicom("dicom-rescale-slope-1e300", _set(RescaleSlope="1e300")),
    dicom("dicom-rows-16384", _set(Rows=16384), which="all"),
    dicom("dicom-rows-columns-65535", _set(Rows=65535, Columns=65535), which="all"),
    dicom("dicom-columns-4096-one", _set(Columns=4096)),
    dicom_bytes("dicom-truncated-pixels", lambda b: b[: len(b) * 3 // 5]),
    dicom_bytes("dicom-truncated-header", lambda b: b[:300]),
    # ------------------------------------------------------------------ DICOM units and decay
    dicom("dicom-half-life-negative", _set_item("RadionuclideHalfLife", "-6586.2"), which="all"),
    dicom("dicom-half-life-zero", _set_item("RadionuclideHalfLife", "0"), which="all"),
    dicom("dicom-half-life-nan", _set_item("RadionuclideHalfLife", "nan"), which="all"),
    dicom("dicom-decay-correction-missing", _set(DecayCorrection=None), which="all"),
    dicom("dicom-decay-correction-unknown", _set(DecayCorrection="LATER"), which="all"),
    dicom("dicom-gml-decay-correction-missing", _gml(None), which="all"),
    dicom("dicom-gml-injection-1900", _gml("START", RadiopharmaceuticalStartDateTime="19000101093000+0100"), which="all"),
    dicom("dicom-timezone-offset-2500", _set(TimezoneOffsetFromUTC="+2500"), which="all"),
    dicom("dicom-cnts-calibration-inf", _set(Units="CNTS"), which="all", extra=("--calibration", "inf")),
    # ------------------------------------------------------------------ NIfTI
    nifti("nifti-negative-dimension", _pack("<h", 42, -5)),
    nifti("nifti-zero-dimension", _pack("<h", 44, 0)),
    nifti("nifti-negative-dimension-info", _pack("<h", 42, -5), command="info"),
    nifti("nifti-header-claims-2000x2000x1000", _header_only((2000, 2000, 1000))),
    nifti("nifti-header-claims-30000-cubed", _header_only((30000, 30000, 30000)), suffix=".nii"),
    nifti("nifti-claims-more-than-present", _pack("<h", 42, 2000)),
    nifti("nifti-claims-more-than-present-nii", _pack("<h", 42, 2000), suffix=".nii"),
    nifti("nifti-huge-vox-offset", _pack("<f", 108, 1e30)),
    nifti("nifti-huge-vox-offset-nii", _pack("<f", 108, 1e12), suffix=".nii"),
    nifti("nifti-nan-pixdim", _pack("<f", 80, float("nan"))),
    nifti("nifti-nan-affine", _pack("<f", 280, float("nan"))),
    nifti("nifti-nan-voxels", _pack("<4f", 352 + 4 * 5000, *[float("nan")] * 4)),
    nifti("nifti-truncated-gz", _gzip_cut, gz_bytes=True),
    nifti("nifti-truncated-data", lambda b: b[: len(b) // 2]),
    nifti("nifti-corrupt-gz", _gzip_corrupt, gz_bytes=True),
    sidecar("sidecar-latin1", '{"Units": "Bq/mL", "Manufacturer": "Ren\u00e9e"}'.encode("latin-1")),
    sidecar("sidecar-nan-scan-start", '{"Units": "Bq/mL", "AcquisitionDateTime": "2026-11-03T10:30:00+01:00", "ScanStart": NaN}'),
    sidecar("sidecar-deep", '{"Units": "Bq/mL", "X": ' + "[" * 100000 + "]" * 100000 + "}"),
    sidecar("sidecar-year-1", '{"Units": "Bq/mL", "TracerRadionuclide": "F-18", "AcquisitionDateTime": "0001-01-01T00:00:00+00:00", '
            '"ScanStart": 3600, "ImageDecayCorrected": true, "ImageDecayCorrectionTime": 0}'),
]


def _good_yaml(record: dict) -> str:
    return yaml.safe_dump(record, sort_keys=False)


def _env_case(case_id: str, value: str, offending: str | None = None) -> Case:
    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        return _measure(case, folder), offending or str(folder)

    return Case(case_id, build, env={"PHANTOMETRY_MAX_VOXELS": value})


CASES += [
    _env_case("max-voxels-below-the-scan", "100000"),
    _env_case("max-voxels-not-a-number", "lots", offending="$PHANTOMETRY_MAX_VOXELS"),
    fill_text("fill-is-a-folder", lambda t: t),  # replaced below: --fill names a folder
]


def _fill_folder(case: Path, src: Path) -> tuple[list[str], str]:
    folder = _copy_dicom(case, src)
    (case / "fill.yaml").unlink()
    (case / "fill.yaml").mkdir()
    return _measure(case, folder), str(case / "fill.yaml")


CASES[-1] = Case("fill-is-a-folder", _fill_folder)


def harmonise_case(case_id: str, extra: tuple[str, ...], offending: str, *, bands: tuple[str, ...] = ("eanm-fdg-2015",),
                   command: str = "harmonise", change_bands: Callable[[str], str] | None = None,
                   change_fill: Callable[[dict], None] | None = None, image: str | None = None) -> Case:
    """A ``harmonise`` (or ``compare --harmonise``) case: a sweep, a template, a band set or an
    input that cannot be harmonised."""

    def build(case: Path, src: Path) -> tuple[list[str], str]:
        folder = _copy_dicom(case, src)
        if change_fill is not None:
            record = yaml.safe_load((src / "fill.yaml").read_text(encoding="utf-8"))
            change_fill(record)
            (case / "fill.yaml").write_text(yaml.safe_dump(record, sort_keys=False), encoding="utf-8")
        band_args: list[str] = []
        for b in bands:
            band_args += ["--bands", b]
        if change_bands is not None:
            target = case / "eanm-fdg-2015.yaml"
            target.write_text(change_bands((src / "eanm-fdg-2015.yaml").read_text(encoding="utf-8")), encoding="utf-8")
            band_args = ["--bands", str(target)]
        target_image = str(case / image) if image else str(folder)
        if command == "compare":
            argv = ["compare", target_image, "--fill", str(case / "fill.yaml"), "--out", str(case / "results"), "--workers", "1",
                    "--harmonise", *band_args, *extra]
        else:
            argv = ["harmonise", target_image, "--fill", str(case / "fill.yaml"), "--out", str(case / "results"), *band_args, *extra]
        return argv, str(case / offending) if offending.startswith("./") else offending

    return Case(case_id, build)


CASES += [
    harmonise_case("harmonise-template-without-recovery", ("--template", "small-animal"), "small-animal"),
    harmonise_case("harmonise-max-fwhm-zero", ("--max-fwhm", "0"), "--max-fwhm"),
    harmonise_case("harmonise-max-fwhm-negative", ("--max-fwhm", "-2"), "--max-fwhm"),
    harmonise_case("harmonise-max-fwhm-not-a-number", ("--max-fwhm", "nan"), "--max-fwhm"),
    harmonise_case("harmonise-max-fwhm-too-wide", ("--max-fwhm", "100"), "--max-fwhm"),
    harmonise_case("harmonise-step-zero", ("--step", "0"), "--step"),
    harmonise_case("harmonise-step-above-max", ("--step", "20"), "--step"),
    harmonise_case("harmonise-too-many-filters", ("--step", "0.01"), "--step"),
    harmonise_case("harmonise-unknown-band-set", (), "nosuch", bands=("nosuch",)),
    harmonise_case("harmonise-band-set-of-another-template", (), "uniform-cylinder-calibration", bands=("uniform-cylinder-calibration",)),
    harmonise_case("harmonise-band-limits-inverted", (), "./eanm-fdg-2015.yaml",
                   change_bands=lambda t: t.replace("low: 0.76, high: 0.89", "low: 0.89, high: 0.76")),
    harmonise_case("harmonise-fill-without-background", (), "./fill.yaml", change_fill=lambda r: r.pop("background")),
    harmonise_case("harmonise-series-missing", (), "./no-such-series", image="no-such-series"),
    harmonise_case("compare-harmonise-without-bands", (), "--harmonise", bands=(), command="compare"),
    harmonise_case("compare-harmonise-template-without-recovery", ("--template", "small-animal"), "small-animal", command="compare"),
]


# ============================================================================ the matrix
def test_matrix_is_large_enough():
    ids = [c.id for c in CASES]
    assert len(ids) == len(set(ids))
    assert len(CASES) >= 60


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_bad_input_is_refused_in_one_line(case: Case, src: Path, tmp_path: Path):
    argv, offending = case.build(tmp_path, src)
    before = _snapshot(tmp_path)
    src_before = _snapshot(src)
    r = subprocess.run([str(SCRIPT), *argv], capture_output=True, text=True, cwd=tmp_path, env={**ENV, **(case.env or {})}, timeout=120)
    lines = [line for line in r.stderr.splitlines() if line.strip()]
    assert "Traceback" not in r.stdout + r.stderr, r.stderr[-3000:]
    assert r.returncode == 2, (r.returncode, r.stdout[-1000:], r.stderr[-2000:])
    assert len(lines) == 1 and lines[0].startswith("phantometry: error: "), r.stderr[-2000:]
    assert offending in lines[0], (offending, lines[0])
    for internal in ("np.float64", "timedelta(", "datetime.datetime(", "Error:", "Exception", "<class"):
        assert internal not in lines[0], lines[0]
    assert r.stdout == "", r.stdout[-1000:]
    assert not (tmp_path / "results").exists()
    assert _snapshot(tmp_path) == before  # nothing written, nothing touched
    assert _snapshot(src) == src_before


# ============================================================================ warned, not refused
def test_half_life_differing_from_the_table_is_replaced_and_warned(src: Path, tmp_path: Path):
    """A header half-life 5 % off the F-18 table value: the table value is used and the
    warning reaches measurements.json (F-18 109.77 min, European Pharmacopoeia / NNDC NuDat)."""
    folder = _copy_dicom(tmp_path, src)
    for f in sorted(folder.glob("*.dcm")):
        _edit_dicom(f, _set_item("RadionuclideHalfLife", f"{109.77 * 60 * 1.05:.1f}"))
    r = subprocess.run([str(SCRIPT), *_measure(tmp_path, folder)], capture_output=True, text=True, cwd=tmp_path, env=ENV, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    warned = json.loads((tmp_path / "results" / "measurements.json").read_text(encoding="utf-8"))["warnings"]
    assert any("RadionuclideHalfLife 6915.5 s differs from the F-18 half-life 6586.2 s" in w and "table value is used" in w
               for w in warned), warned


# ============================================================================ fuzz
def _mutate(rng: random.Random, data: bytes, low: int, high: int) -> bytes:
    """Flip bytes, overwrite a run, truncate, or write a boundary value inside [low, high)."""
    b = bytearray(data)
    kind = rng.randrange(4)
    at = rng.randrange(low, high)
    if kind == 0:
        for _ in range(rng.randint(1, 4)):
            b[rng.randrange(low, high)] = rng.randrange(256)
    elif kind == 1:
        n = rng.randint(1, 16)
        b[at:at + n] = bytes(rng.randrange(256) for _ in range(n))
    elif kind == 2:
        del b[at:]
    else:
        v = rng.choice([b"\xff\xff\xff\xff", b"\x00\x00\x00\x00", b"\xff\x7f", b"\x00\x80", b"\x00\x00\xc0\x7f", b"\x00\x00\x80\x7f"])
        b[at:at + len(v)] = v
    return bytes(b)


def _pixel_data_offset(data: bytes) -> int:
    at = data.find(b"\xe0\x7f\x10\x00")  # (7FE0,0010) Pixel Data, little endian (DICOM PS3.5)
    assert at > 0
    return at


def _load_or_refuse(load: Callable[[], object]) -> str:
    """"ok" or "refused"; any exception that is not a PhantometryError fails the test."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            load()
        except PhantometryError:
            return "refused"
    return "ok"


def test_fuzz_dicom_header_bytes(src: Path, tmp_path: Path):
    """120 damaged headers of the middle slice of a 5-slice series (file meta and data set up
    to Pixel Data). The series is five consecutive slices of the scan without NumberOfSlices, so
    an undamaged load goes all the way through geometry, units and pixels, quickly."""
    files = sorted((src / "dicom").glob("*.dcm"))[20:25]
    for f in files:
        shutil.copy(f, tmp_path / f.name)
        _edit_dicom(tmp_path / f.name, _set(NumberOfSlices=None))
    victim = tmp_path / files[2].name
    others = [tmp_path / f.name for f in files if f.name != victim.name]
    assert load_dicom([*others, victim]).shape == (5, 101, 101)
    raw = victim.read_bytes()
    end = _pixel_data_offset(raw) + 12
    rng = random.Random(20261103)
    fuzzed = tmp_path / "fuzzed.dcm"
    outcomes = []
    for _ in range(120):
        fuzzed.write_bytes(_mutate(rng, raw, 128, end))
        outcomes.append(_load_or_refuse(lambda: load_dicom([*others, fuzzed])))
    assert outcomes.count("refused") > 30 and outcomes.count("ok") > 10  # the fuzz reaches the checks and past them


def test_fuzz_nifti_header_bytes(src: Path, tmp_path: Path):
    """80 damaged NIfTI-1 headers (the 348-byte header and the extension flag)."""
    raw = _nifti_raw(src)
    shutil.copy(src / "nifti" / "phantom.json", tmp_path / "fuzzed.json")
    rng = random.Random(348)
    outcomes = []
    for n in range(80):
        data = _mutate(rng, raw, 0, 352)
        path = tmp_path / ("fuzzed.nii.gz" if n % 4 == 0 else "fuzzed.nii")
        for old in tmp_path.glob("fuzzed.nii*"):
            old.unlink()
        path.write_bytes(gzip.compress(data, compresslevel=1) if path.suffix == ".gz" else data)
        outcomes.append(_load_or_refuse(lambda: load_nifti(path)))
    assert outcomes.count("refused") > 15 and outcomes.count("ok") > 5


@pytest.mark.parametrize("seed", range(4))
def test_fuzz_through_the_console_script(src: Path, tmp_path: Path, seed: int):
    """A few fuzzed headers through ``phantometry info``: exit 0, or exit 2 with one line."""
    rng = random.Random(1000 + seed)
    if seed % 2 == 0:
        shutil.copytree(src / "dicom", tmp_path / "dicom")
        victim = tmp_path / "dicom" / "PT_0030.dcm"
        raw = victim.read_bytes()
        victim.write_bytes(_mutate(rng, raw, 128, _pixel_data_offset(raw) + 12))
        target = tmp_path / "dicom"
    else:
        shutil.copy(src / "nifti" / "phantom.json", tmp_path / "phantom.json")
        target = tmp_path / "phantom.nii"
        target.write_bytes(_mutate(rng, _nifti_raw(src), 0, 352))
    before = _snapshot(tmp_path)
    r = subprocess.run([str(SCRIPT), "info", str(target)], capture_output=True, text=True, cwd=tmp_path, env=ENV, timeout=120)
    assert "Traceback" not in r.stdout + r.stderr
    assert r.returncode in (0, 2), r.stderr
    if r.returncode == 2:
        lines = [line for line in r.stderr.splitlines() if line.strip()]
        assert len(lines) == 1 and lines[0].startswith("phantometry: error: ") and str(tmp_path) in lines[0], r.stderr
    assert _snapshot(tmp_path) == before
