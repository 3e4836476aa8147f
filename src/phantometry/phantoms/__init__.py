"""Phantom kinds as plug-ins: one module per analysis kind, found by the template's
``analysis.kind``.

Every module of this package (other than :mod:`.base`) that defines ``KIND``, an instance of
:class:`~phantometry.phantoms.base.PhantomKind`, is a kind; adding a kind means adding one
module here and a template that names it. Shipped: ``body_image_quality`` (:mod:`.body`),
``small_animal_image_quality`` (:mod:`.small_animal`), ``inserts`` (:mod:`.inserts`).

:func:`load_template` loads a template and checks it completely (the schema, the geometry of
:func:`phantometry.templates.check_template`, and the kind's own options and checks); the
pipeline and the command line load templates through it.
"""

from __future__ import annotations

import importlib
import os
import pkgutil
from functools import lru_cache
from typing import Callable, Sequence

from ..bands import BandSet, check_band_set
from ..bands import load_band_set as load_band_set_unchecked
from ..errors import BandError, PhantometryError, TemplateError
from ..templates import Template
from ..templates import check_template as check_geometry
from ..templates import load_template as load_template_schema
from .base import Analysis, AnalysisSettings, PhantomKind

__all__ = [
    "Analysis",
    "AnalysisSettings",
    "PhantomKind",
    "kinds",
    "get_kind",
    "kind_of",
    "load_template",
    "check_template",
    "known_metrics",
    "check_band_file",
    "load_band_set",
    "suggest_template",
]


@lru_cache(maxsize=1)
def kinds() -> dict[str, PhantomKind]:
    """Analysis kind name -> kind, for every kind module of this package."""
    found: dict[str, PhantomKind] = {}
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        if info.name.startswith("_") or info.name == "base":
            continue
        module = importlib.import_module(f"{__name__}.{info.name}")
        kind = getattr(module, "KIND", None)
        if isinstance(kind, PhantomKind):
            if kind.name in found:  # pragma: no cover - a packaging mistake
                raise TemplateError(f"analysis kind {kind.name} is defined twice ({info.name})")
            found[kind.name] = kind
    return found


def get_kind(name: str) -> PhantomKind:
    """The kind called ``name``.

    Raises
    ------
    TemplateError
        Unknown kind; the message lists the known ones.
    """
    known = kinds()
    if name not in known:
        raise TemplateError(f"unknown analysis kind {name!r}; known: {', '.join(sorted(known))}")
    return known[name]


def kind_of(template: Template) -> PhantomKind:
    """The kind of ``template``, with its ``analysis:`` options validated."""
    try:
        kind = get_kind(template.analysis.kind)
    except TemplateError as exc:
        raise TemplateError(f"{template.source_path or template.name}: {exc}") from None
    kind.options(template)
    return kind


def check_template(template: Template) -> list[str]:
    """Every check of a template: geometry (:func:`phantometry.templates.check_template`) and
    the kind's own (:meth:`PhantomKind.check_template`). Returns the problems found."""
    return check_geometry(template) + kind_of(template).check_template(template)


def known_metrics(template: Template) -> dict[str, tuple[str, ...]]:
    """ROI name -> metrics an analysis of ``template`` produces."""
    return kind_of(template).known_metrics(template)


def load_template(name_or_path: str | os.PathLike, extra_dirs: Sequence[str | os.PathLike] | None = None) -> Template:
    """Load a template by name or file and check it completely.

    Raises
    ------
    TemplateError
        Not found, invalid schema or options, or a geometric problem (each listed).
    """
    tpl = load_template_schema(name_or_path, list(extra_dirs or []))  # schema and geometry checked
    problems = kind_of(tpl).check_template(tpl)
    if problems:
        raise TemplateError(f"{tpl.source_path or tpl.name}: template fails its checks: " + "; ".join(problems))
    return tpl


def check_band_file(band_set: BandSet, templates_dirs: Sequence[str | os.PathLike] | None = None) -> Template:
    """Check a band set against the template it names (loaded by name); returns that template.

    Raises
    ------
    BandError
        The template cannot be loaded, or an entry names an ROI or metric it lacks.
    """
    where = band_set.path or band_set.name
    try:
        tpl = load_template(band_set.template, templates_dirs)
    except PhantometryError as exc:
        raise BandError(f"{where}: template {band_set.template!r} cannot be loaded ({exc})") from None
    check_band_set(band_set, tpl.name, known_metrics(tpl))
    return tpl


def load_band_set(name_or_path: str | os.PathLike | BandSet, extra_dirs: Sequence[str | os.PathLike] | None = None,
                  templates_dirs: Sequence[str | os.PathLike] | None = None) -> BandSet:
    """A band set by name or file (:func:`phantometry.bands.load_band_set`), checked against
    the template it names (:func:`check_band_file`)."""
    bs = load_band_set_unchecked(name_or_path, extra_dirs)
    check_band_file(bs, templates_dirs)
    return bs


def suggest_template(extent_mm: Sequence[float], exclude: str | None = None,
                     extra_dirs: Sequence[str | os.PathLike] | None = None,
                     accept: Callable[[Template], bool] | None = None) -> str | None:
    """The name of the template whose phantom an object of principal extents ``extent_mm``
    (mm) most likely is, or None.

    Every template found by name (:func:`phantometry.templates.list_templates`) is asked
    through its kind (:meth:`PhantomKind.size_mismatch`); the closest one wins. ``exclude``
    (a template name) is left out, and templates ``accept`` refuses (e.g. those whose body is
    not round, for a round object); templates that do not load are skipped.
    """
    from ..templates import list_templates, load_template_file

    best: tuple[float, str] | None = None
    for name, path in list_templates(list(extra_dirs or [])).items():
        if name == exclude:
            continue
        try:
            tpl = load_template_file(path)
            if tpl.name == exclude or (accept is not None and not accept(tpl)):
                continue
            score = kind_of(tpl).size_mismatch(tpl, extent_mm)
        except PhantometryError:
            continue
        if score is not None and (best is None or score < best[0]):
            best = (score, tpl.name)
    return None if best is None else best[1]
