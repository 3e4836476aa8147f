"""ROI templates: a phantom described in its own frame (mm), loaded from YAML and validated.

A template states *what* the phantom is (body outline, inserts, background ROI sets, which
analysis applies); :mod:`phantometry.locate` finds *where* it is in an image. The schema is
phantometry's own and is documented in the README ("ROI templates").

Template frame
--------------
Right-handed, mm. ``+z`` runs along the phantom axis; ``z = 0`` is the reference plane (the
sphere plane of a body phantom); ``+y`` points to the anterior (curved) side of a body phantom.
"""

from __future__ import annotations

import math
import os
from functools import cached_property
from pathlib import Path
from typing import Annotated, Any, Literal, Union

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator, model_validator

from .resources import builtin_dir, is_file_reference, list_named, search_path
from .yamlfile import read_yaml_file, validation_problems
from .errors import TemplateError

TEMPLATE_PATH_ENV = "PHANTOMETRY_TEMPLATES"

Vec3 = tuple[float, float, float]
Vec2 = tuple[float, float]


#: Largest magnitude of any number in a template (a size in mm): 100 m.
MAX_TEMPLATE_NUMBER = 1.0e5


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, allow_inf_nan=False)


def _first_huge(value: Any, path: str) -> str | None:
    """Path of the first number of magnitude :data:`MAX_TEMPLATE_NUMBER` or more, else None."""
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return path or "(top level)" if abs(value) >= MAX_TEMPLATE_NUMBER else None
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, (list, tuple)) else ()
    for key, item in items:
        found = _first_huge(item, f"{path}.{key}" if path else str(key))
        if found is not None:
            return found
    return None


# ---------------------------------------------------------------------------------------- body
class CylinderBody(_Strict):
    """A right circular cylinder along the template z axis."""

    shape: Literal["cylinder"]
    diameter_mm: float = Field(gt=0)
    centre_xy_mm: Vec2 = (0.0, 0.0)
    z_range_mm: Vec2

    def inside_xy(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        cx, cy = self.centre_xy_mm
        return (x - cx) ** 2 + (y - cy) ** 2 <= (self.diameter_mm / 2) ** 2

    def edge_distance_xy(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Distance (mm) from in-plane points inside the outline to the outline (negative outside)."""
        cx, cy = self.centre_xy_mm
        return self.diameter_mm / 2 - np.hypot(x - cx, y - cy)

    def outline_xy(self, n: int = 720) -> np.ndarray:
        t = np.linspace(0, 2 * np.pi, n, endpoint=False)
        r = self.diameter_mm / 2
        return np.c_[self.centre_xy_mm[0] + r * np.cos(t), self.centre_xy_mm[1] + r * np.sin(t)]

    @property
    def half_extent_xy_mm(self) -> float:
        return self.diameter_mm / 2 + math.hypot(*self.centre_xy_mm)


class DShapeBody(_Strict):
    """The body-phantom cross-section: a half-circle over a lower part with rounded corners.

    The half-circle (radius ``arc_radius_mm``) is centred at ``centre_xy_mm`` and lies on the
    ``+y`` side. Below it, a part ``lower_height_mm`` high whose flat bottom is
    ``flat_width_mm`` wide, joined to the sides by corners of ``corner_radius_mm``; the total
    width is ``flat_width_mm + 2 * corner_radius_mm`` and must equal twice the arc radius.
    """

    shape: Literal["d_shape"]
    arc_radius_mm: float = Field(gt=0)
    flat_width_mm: float = Field(ge=0)
    corner_radius_mm: float = Field(gt=0)
    centre_xy_mm: Vec2 = (0.0, 0.0)
    z_range_mm: Vec2

    @model_validator(mode="after")
    def _widths_match(self) -> "DShapeBody":
        width = self.flat_width_mm + 2 * self.corner_radius_mm
        if abs(width - 2 * self.arc_radius_mm) > 1e-6:
            raise ValueError(
                f"flat_width_mm + 2*corner_radius_mm = {width:g} must equal 2*arc_radius_mm = "
                f"{2 * self.arc_radius_mm:g}"
            )
        return self

    def inside_xy(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        cx, cy = self.centre_xy_mm
        x = x - cx
        y = y - cy
        r, c, half_flat = self.arc_radius_mm, self.corner_radius_mm, self.flat_width_mm / 2
        upper = (y >= 0) & (x * x + y * y <= r * r)
        lower = (y < 0) & (y >= -c) & (
            (np.abs(x) <= half_flat) | ((np.abs(x) - half_flat) ** 2 + y * y <= c * c)
        )
        return upper | lower

    def edge_distance_xy(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """Distance (mm) from in-plane points inside the outline to the outline (negative outside).

        The cross-section is the intersection of the disc of radius ``arc_radius_mm`` with
        the convex set ``K + B_c`` (``K`` the half-strip ``|x| <= flat_width/2, y >= 0``,
        ``B_c`` the disc of the corner radius). Inside an intersection the distance to the
        boundary is the smaller of the distances to the two boundaries, and inside ``K + B_c``
        it is ``c + dist(p, boundary of K)`` for ``p`` in ``K``, else ``c - dist(p, K)``
        (mathematics: support functions of a Minkowski sum with a disc).
        """
        cx, cy = self.centre_xy_mm
        x = x - cx
        y = y - cy
        r, c, half_flat = self.arc_radius_mm, self.corner_radius_mm, self.flat_width_mm / 2
        ax = np.abs(x)
        in_k = (ax <= half_flat) & (y >= 0)
        to_k = np.hypot(np.maximum(ax - half_flat, 0), np.maximum(-y, 0))
        d_offset = np.where(in_k, c + np.minimum(half_flat - ax, y), c - to_k)
        return np.minimum(r - np.hypot(x, y), d_offset)

    def outline_xy(self, n: int = 1440) -> np.ndarray:
        cx, cy = self.centre_xy_mm
        r, c, hf = self.arc_radius_mm, self.corner_radius_mm, self.flat_width_mm / 2
        t = np.linspace(0, np.pi, n // 2)
        arc = np.c_[r * np.cos(t), r * np.sin(t)]
        a = np.linspace(np.pi, 1.5 * np.pi, n // 8)
        left = np.c_[-hf + c * np.cos(a), c * np.sin(a)]
        bottom = np.c_[np.linspace(-hf, hf, n // 8), np.full(n // 8, -c)]
        a2 = np.linspace(1.5 * np.pi, 2 * np.pi, n // 8)
        right = np.c_[hf + c * np.cos(a2), c * np.sin(a2)]
        return np.r_[arc, left, bottom, right] + [cx, cy]

    @property
    def half_extent_xy_mm(self) -> float:
        return self.arc_radius_mm + math.hypot(*self.centre_xy_mm)


Body = Annotated[Union[CylinderBody, DShapeBody], Field(discriminator="shape")]


# ------------------------------------------------------------------------------------- inserts
Fill = Literal["fill_record", "background", "cold", "solid"]
Role = Literal["sphere", "low_density", "rod", "chamber", "solid_section", "other"]


class Insert(_Strict):
    """A fillable or solid element inside the body.

    ``fill`` says where its activity comes from: ``fill_record`` (hot or cold as the fill
    record states), ``background`` (same solution as the body), ``cold`` (never radioactive:
    water, air, low-density material) or ``solid`` (plastic, no activity).
    ``diameter_mm`` is the inner (fillable) diameter; ``wall_mm`` an inactive wall around it.
    """

    name: str = Field(pattern=r"^[a-z][a-z0-9_]*$")
    shape: Literal["sphere", "cylinder"]
    role: Role
    centre_mm: Vec3
    diameter_mm: float = Field(gt=0)
    wall_mm: float = Field(default=0.0, ge=0)
    length_mm: float | None = Field(default=None, gt=0)
    axis: Vec3 = (0.0, 0.0, 1.0)
    fill: Fill = "fill_record"
    inside: str | None = None
    note: str | None = None

    @model_validator(mode="after")
    def _shape_fields(self) -> "Insert":
        if self.shape == "cylinder" and self.length_mm is None:
            raise ValueError("a cylinder needs length_mm")
        if self.shape == "sphere" and self.length_mm is not None:
            raise ValueError("a sphere takes no length_mm")
        if np.linalg.norm(self.axis) < 1e-9:
            raise ValueError("axis must be a non-zero vector")
        return self

    @property
    def outer_diameter_mm(self) -> float:
        return self.diameter_mm + 2 * self.wall_mm

    @property
    def axis_unit(self) -> np.ndarray:
        a = np.asarray(self.axis, float)
        return a / np.linalg.norm(a)

    @property
    def volume_ml(self) -> float:
        r = self.diameter_mm / 2
        if self.shape == "sphere":
            return 4.0 / 3.0 * math.pi * r**3 / 1000.0
        return math.pi * r * r * float(self.length_mm) / 1000.0


class BackgroundSet(_Strict):
    """Background ROIs: circles on planes parallel to the reference plane.

    Every centre is used on every slice offset and with every diameter (concentric ROIs).
    """

    centres_xy_mm: list[Vec2] = Field(min_length=1)
    slice_offsets_mm: list[float] = Field(min_length=1)
    diameters_mm: list[float] = Field(min_length=1)
    min_clearance_mm: float = Field(default=15.0, ge=0)
    note: str | None = None

    @field_validator("diameters_mm")
    @classmethod
    def _positive(cls, v: list[float]) -> list[float]:
        if any(d <= 0 for d in v):
            raise ValueError("diameters must be positive")
        return sorted(v)

    @property
    def n_rois(self) -> int:
        return len(self.centres_xy_mm) * len(self.slice_offsets_mm)


class AnalysisBlock(BaseModel):
    """A template's ``analysis:`` block: which analysis kind applies, and its options.

    The options are validated by the kind (:mod:`phantometry.phantoms`, one module per kind,
    ``PhantomKind.options``); here only ``kind`` is checked, so a new kind needs no change to
    this module.
    """

    model_config = ConfigDict(extra="allow", frozen=True)

    kind: str = Field(pattern=r"^[a-z][a-z0-9_]*$")

    def raw(self) -> dict[str, Any]:
        """The block as written (kind and options)."""
        return {"kind": self.kind, **(self.model_extra or {})}


class Template(_Strict):
    """A validated phantom template (see the module docstring for the frame)."""

    phantometry_template: Literal[1]
    name: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$")
    title: str
    description: str | None = None
    sources: list[str] = Field(min_length=1)
    notes: list[str] = []
    body: Body
    inserts: list[Insert]
    background: BackgroundSet | None = None
    analysis: AnalysisBlock
    source_path: str | None = Field(default=None, exclude=True)
    #: the analysis options validated by the template's kind (set by ``PhantomKind.options``)
    _kind_options: Any = PrivateAttr(default=None)

    @model_validator(mode="after")
    def _sizes(self) -> "Template":
        where = _first_huge(self.model_dump(exclude={"source_path"}), "")
        if where is not None:
            raise ValueError(f"{where}: {MAX_TEMPLATE_NUMBER:g} or more is far beyond any phantom (mm); check the value")
        return self

    @model_validator(mode="after")
    def _references(self) -> "Template":
        names = [i.name for i in self.inserts]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ValueError(f"insert names must be unique; repeated: {', '.join(dupes)}")
        for ins in self.inserts:
            if ins.inside is not None and ins.inside not in names:
                raise ValueError(f"insert {ins.name}: inside names unknown insert {ins.inside!r}")
        return self

    # -------------------------------------------------------------------------- queries
    def insert(self, name: str) -> Insert:
        for ins in self.inserts:
            if ins.name == name:
                return ins
        raise TemplateError(
            f"template {self.name}: no insert named {name!r}; inserts: {', '.join(i.name for i in self.inserts)}"
        )

    @property
    def fillable_names(self) -> list[str]:
        """Names of the inserts whose activity the fill record states (``fill: fill_record``)."""
        return [i.name for i in self.inserts if i.fill == "fill_record"]

    @property
    def spheres(self) -> list[Insert]:
        """Sphere inserts, smallest first."""
        return sorted((i for i in self.inserts if i.role == "sphere"), key=lambda i: i.diameter_mm)

    @property
    def rods(self) -> list[Insert]:
        """Rod inserts, thinnest first."""
        return sorted((i for i in self.inserts if i.role == "rod"), key=lambda i: i.diameter_mm)

    @property
    def chambers(self) -> list[Insert]:
        return [i for i in self.inserts if i.role == "chamber"]

    @property
    def kind_options(self) -> BaseModel | None:
        """The analysis options as validated by the template's kind (None until validated)."""
        return self._kind_options

    def set_kind_options(self, value: BaseModel) -> None:
        """Keep the options as validated by the template's kind (``PhantomKind.options``)."""
        self._kind_options = value

    def painting_order(self) -> list[Insert]:
        """Inserts in the order their activity is laid down: an insert that holds others
        (``inside:``) before the ones it holds, so those overwrite it where they are."""
        done: list[Insert] = []
        remaining = list(self.inserts)
        while remaining:
            for ins in remaining:
                if ins.inside is None or ins.inside in {d.name for d in done}:
                    done.append(ins)
                    remaining.remove(ins)
                    break
            else:  # a cycle of inside: references (refused by check_template): keep the rest as written
                done.extend(remaining)
                break
        return done

    def body_inside(self, points_mm: np.ndarray) -> np.ndarray:
        """True where template-frame points (..., 3) lie inside the body interior."""
        p = np.asarray(points_mm, float)
        z0, z1 = self.body.z_range_mm
        return self.body.inside_xy(p[..., 0], p[..., 1]) & (p[..., 2] >= z0) & (p[..., 2] <= z1)

    @property
    def body_length_mm(self) -> float:
        z0, z1 = self.body.z_range_mm
        return z1 - z0

    @property
    def body_centre_mm(self) -> np.ndarray:
        z0, z1 = self.body.z_range_mm
        return np.array([*self.body.centre_xy_mm, (z0 + z1) / 2])

    @property
    def bounding_radius_mm(self) -> float:
        """Radius of a sphere about the template origin that holds the whole body."""
        z0, z1 = self.body.z_range_mm
        return math.hypot(self.body.half_extent_xy_mm, max(abs(z0), abs(z1)))

    @cached_property
    def _outline(self) -> np.ndarray:
        return self.body.outline_xy()

    def distance_to_body_edge_xy(self, xy: np.ndarray) -> np.ndarray:
        """Distance (mm) from in-plane points (..., 2) to the body outline (positive inside)."""
        xy = np.asarray(xy, float)
        d = np.min(np.linalg.norm(xy[..., None, :] - self._outline, axis=-1), axis=-1)
        inside = self.body.inside_xy(xy[..., 0], xy[..., 1])
        return np.where(inside, d, -d)

    def summary(self) -> dict[str, Any]:
        return self.model_dump(mode="json")


# ----------------------------------------------------------------------------------- loading
#: Location parts pydantic adds for discriminated unions and validators (not keys of the file).
_UNION_TAGS = ("cylinder", "d_shape", "function-after[_shape_fields(), Insert]")


def format_validation_error(path: str, err: ValidationError, prefix: str | None = None) -> str:
    """Pydantic's errors of a template (or of its ``analysis:`` block, ``prefix="analysis"``)
    as one line naming the file and each key at fault."""

    def place(loc: tuple) -> str:
        key = ".".join(str(x) for x in loc if not (isinstance(x, str) and x in _UNION_TAGS))
        if prefix:
            key = f"{prefix}.{key}" if key else prefix
        return key or "(top level)"

    def problem(e: dict[str, Any]) -> str | None:
        if e["type"] == "extra_forbidden":
            return "unknown key (check the spelling; see the README section on ROI templates)"
        if e["type"] == "missing":
            return e["msg"]
        return None

    return f"{path}: invalid template: " + "; ".join(validation_problems(err, place=place, problem=problem))


def template_from_dict(data: Any, source: str = "<template>", *, check: bool = True) -> Template:
    """Validate a parsed YAML mapping as a :class:`Template`.

    Parameters
    ----------
    data : the parsed YAML mapping.
    source : where it came from, named in messages.
    check : also run the geometric checks of :func:`check_template` (every load does; only
        a caller that wants the list of problems itself, such as a test of the checks, turns
        them off).

    Raises
    ------
    TemplateError
        Naming ``source``, each key at fault and what is allowed, or every geometric problem.
    """
    if not isinstance(data, dict):
        raise TemplateError(f"{source}: a template must be a YAML mapping, got {type(data).__name__}")
    try:
        tpl = Template.model_validate({**data, "source_path": source})
    except ValidationError as err:
        raise TemplateError(format_validation_error(source, err)) from None
    except (ValueError, ArithmeticError) as err:  # numpy/math on absurd numbers in a validator
        raise TemplateError(f"{source}: invalid template: a number cannot be used ({err}); check the values") from None
    if check:
        problems = check_template(tpl)
        if problems:
            raise TemplateError(f"{source}: {len(problems)} geometric problem(s): " + "; ".join(problems))
    return tpl


def load_template_file(path: str | os.PathLike, *, check: bool = True) -> Template:
    """Load and validate one template YAML file (``check``: also its geometric checks)."""
    p = Path(path)
    return template_from_dict(read_yaml_file(p, TemplateError, "template"), source=str(p), check=check)


def builtin_template_dir() -> Path:
    """Folder of the templates shipped with phantometry (inside the installed package)."""
    return builtin_dir()


def template_search_path(extra_dirs: list[str | os.PathLike] | None = None) -> list[Path]:
    """Folders searched for templates by name: ``--templates`` dirs, ``$PHANTOMETRY_TEMPLATES``
    (os.pathsep-separated), then the built-in folder and its ``examples/``."""
    builtin = builtin_template_dir()
    return search_path(extra_dirs, TEMPLATE_PATH_ENV, [builtin, builtin / "examples"])


def list_templates(extra_dirs: list[str | os.PathLike] | None = None) -> dict[str, Path]:
    """Template name -> file, earlier folders winning (so a user folder can shadow a built-in)."""
    return list_named(template_search_path(extra_dirs), skip_prefixes=("bands", "_"))


def load_template(name_or_path: str | os.PathLike, extra_dirs: list[str | os.PathLike] | None = None, *, check: bool = True) -> Template:
    """Load a template by name (searched as :func:`template_search_path` says) or by file path.

    ``check=False`` skips the geometric checks (:func:`check_template`): the synthesizer paints
    variants of a phantom whose background ROI positions need not fit it.
    """
    p = Path(name_or_path)
    if is_file_reference(p):
        if not p.exists():
            raise TemplateError(f"{p}: template file not found")
        return load_template_file(p, check=check)
    available = list_templates(extra_dirs)
    if str(name_or_path) not in available:
        raise TemplateError(
            f"unknown template {str(name_or_path)!r}; available: {', '.join(sorted(available)) or 'none'}"
            f" (add a folder with --templates DIR or ${TEMPLATE_PATH_ENV})"
        )
    return load_template_file(available[str(name_or_path)], check=check)


# ------------------------------------------------------------------------------------ checks
def check_template(tpl: Template) -> list[str]:
    """Geometric checks beyond the schema. Returns problems (empty when the template is sound).

    * every insert lies inside the body (including its wall);
    * inserts do not overlap, unless one declares ``inside:`` the other;
    * every background ROI, at every slice offset and size, keeps ``min_clearance_mm`` from the
      body edge, from every sphere in the reference plane and from every cylinder insert
      (the NEMA NU 2 rule: background ROIs at least 15 mm from the phantom edge and the spheres).
    """
    problems: list[str] = []
    z0, z1 = tpl.body.z_range_mm
    for idx, ins in enumerate(tpl.inserts):
        key = f"inserts[{idx}] ({ins.name})"
        pts = _insert_surface_points(ins)
        # pull surface points 1 um inwards so a section exactly as wide as the body passes
        centre = np.asarray(ins.centre_mm, float)
        pts = centre + (pts - centre) * (1 - 1e-6 / max(ins.outer_diameter_mm, 1e-9))
        outside = ~tpl.body_inside(pts)
        if outside.any():
            worst = pts[outside][0]
            problems.append(f"{key}: extends outside the body near ({worst[0]:.1f}, {worst[1]:.1f}, {worst[2]:.1f}) mm")
    for a_idx, a in enumerate(tpl.inserts):
        for b in tpl.inserts[a_idx + 1 :]:
            if a.inside == b.name or b.inside == a.name:
                continue
            if _inserts_overlap(a, b):
                problems.append(f"inserts {a.name} and {b.name}: overlap (declare inside: if one holds the other)")
    bg = tpl.background
    if bg is not None:
        r_max = max(bg.diameters_mm) / 2
        centres = np.asarray(bg.centres_xy_mm, float)
        edge = tpl.distance_to_body_edge_xy(centres) - r_max
        for c_idx, (c, e) in enumerate(zip(centres, edge)):
            if e < bg.min_clearance_mm - 1e-6:
                problems.append(
                    f"background.centres_xy_mm[{c_idx}] ({c[0]:g}, {c[1]:g}): {max(bg.diameters_mm):g} mm ROI edge is "
                    f"{e:.1f} mm from the body edge, less than min_clearance_mm {bg.min_clearance_mm:g}"
                )
        for off in bg.slice_offsets_mm:
            if not (z0 + bg.min_clearance_mm <= off <= z1 - bg.min_clearance_mm):
                problems.append(f"background.slice_offsets_mm: {off:g} mm is within {bg.min_clearance_mm:g} mm of the body ends")
        for ins in tpl.inserts:
            if ins.role == "sphere":
                d = np.linalg.norm(centres - np.asarray(ins.centre_mm[:2]), axis=1) - r_max - ins.outer_diameter_mm / 2
            elif ins.shape == "cylinder" and abs(ins.axis_unit[2]) > 0.999:
                d = np.linalg.norm(centres - np.asarray(ins.centre_mm[:2]), axis=1) - r_max - ins.outer_diameter_mm / 2
            else:
                continue
            for c_idx, dist in enumerate(d):
                if dist < bg.min_clearance_mm - 1e-6:
                    problems.append(
                        f"background.centres_xy_mm[{c_idx}]: {max(bg.diameters_mm):g} mm ROI edge is {dist:.1f} mm from "
                        f"{ins.name}, less than min_clearance_mm {bg.min_clearance_mm:g}"
                    )
    return problems


def _insert_surface_points(ins: Insert, n: int = 24) -> np.ndarray:
    c = np.asarray(ins.centre_mm, float)
    r = ins.outer_diameter_mm / 2
    if ins.shape == "sphere":
        phi = np.linspace(0, 2 * np.pi, n, endpoint=False)
        th = np.linspace(0, np.pi, n // 2)
        P, T = np.meshgrid(phi, th)
        dirs = np.stack([np.sin(T) * np.cos(P), np.sin(T) * np.sin(P), np.cos(T)], axis=-1).reshape(-1, 3)
        return c + r * dirs
    ax = ins.axis_unit
    u = np.cross(ax, [1.0, 0, 0] if abs(ax[0]) < 0.9 else [0, 1.0, 0])
    u /= np.linalg.norm(u)
    v = np.cross(ax, u)
    phi = np.linspace(0, 2 * np.pi, n, endpoint=False)
    ring = r * (np.cos(phi)[:, None] * u + np.sin(phi)[:, None] * v)
    half = float(ins.length_mm) / 2 + ins.wall_mm
    ts = np.linspace(-half, half, 9)
    return (c + ring[None, :, :] + ts[:, None, None] * ax).reshape(-1, 3)


def _inserts_overlap(a: Insert, b: Insert) -> bool:
    ca, cb = np.asarray(a.centre_mm, float), np.asarray(b.centre_mm, float)
    ra, rb = a.outer_diameter_mm / 2, b.outer_diameter_mm / 2
    if a.shape == "sphere" and b.shape == "sphere":
        return float(np.linalg.norm(ca - cb)) < ra + rb
    if a.shape == "cylinder" and b.shape == "sphere":
        a, b, ca, cb, ra, rb = b, a, cb, ca, rb, ra
    if b.shape == "cylinder":
        ax = b.axis_unit
        half = float(b.length_mm) / 2 + b.wall_mm
        if a.shape == "sphere":
            t = float(np.dot(ca - cb, ax))
            radial = float(np.linalg.norm((ca - cb) - t * ax))
            return radial < ra + rb and abs(t) < half + ra
        # cylinder-cylinder: test sampled points of a against b
        pts = _insert_surface_points(a, 36)
        rel = pts - cb
        t = rel @ ax
        radial = np.linalg.norm(rel - t[:, None] * ax, axis=1)
        return bool(np.any((radial < rb - 1e-6) & (np.abs(t) < half - 1e-6)))
    return False
