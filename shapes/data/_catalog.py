"""Read a catalog of part classes: the demo's ``catalog.json`` or a user's folder of meshes.

A catalog names the classes, which class is the mirror twin of which, and the mesh files that
are instances of each class. An instance's *group* ties together meshes that must land in the
same dataset split (a part and its mirror image, variants of one design), so that no test
part has a near-copy in training.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

from shapes.errors import DataError
from shapes.data._read import MESH_SUFFIXES

__all__ = ["Instance", "Catalog", "read_catalog", "CATALOG_FILE", "TWINS_FILE"]

CATALOG_FILE = "catalog.json"
TWINS_FILE = "twins.json"
_FORMAT = 1


@dataclass(frozen=True)
class Instance:
    """One mesh file of a class.

    Attributes
    ----------
    cls : str
        Class name.
    file : Path
        Absolute path of the mesh file.
    group : str
        Split unit: instances sharing a group go to the same split, across all classes.
    params : dict
        Generator parameters (demo catalog), empty for a user's folder.
    """

    cls: str
    file: Path
    group: str
    params: dict = field(default_factory=dict)


@dataclass(frozen=True)
class Catalog:
    """Classes, mirror twins and instances of a part catalog.

    Attributes
    ----------
    root : Path
        Absolute folder of the catalog.
    classes : tuple of str
        Class names; a label is an index into this tuple.
    twins : dict str -> str
        Each class's mirror twin; the class itself when it is achiral.
    twins_declared : bool
        Whether the folder states its mirror twins at all (``twins.json``, or ``twin``/``handed``
        fields in ``catalog.json``); when not, every class reads as its own twin.
    handed : dict str -> bool
        True when the class differs from its mirror image (its twin is another class).
    instances : tuple of Instance
    families, standards, descriptions : dict str -> str
        Per class, when the catalog states them (empty otherwise).
    title, units : str
    """

    root: Path
    classes: tuple[str, ...]
    twins: dict[str, str]
    handed: dict[str, bool]
    instances: tuple[Instance, ...]
    families: dict[str, str] = field(default_factory=dict)
    standards: dict[str, str] = field(default_factory=dict)
    descriptions: dict[str, str] = field(default_factory=dict)
    title: str = ""
    units: str = ""
    twins_declared: bool = False  # the folder states its twins (twins.json, or twin/handed fields in catalog.json)

    def of_class(self, cls: str) -> tuple[Instance, ...]:
        """Instances of one class."""
        return tuple(inst for inst in self.instances if inst.cls == cls)


def _load_json(path: Path, folder: Path):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise DataError(f"catalog {folder}: cannot read {path.name}: {exc}") from exc
    except json.JSONDecodeError as exc:
        raise DataError(
            f"catalog {folder}: {path.name} is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})."
        ) from exc


def _check_twins(twins: dict[str, str], classes, folder: Path, source: str) -> dict[str, str]:
    """Complete a partial twin map symmetrically and check it; return class -> twin."""
    known = set(classes)
    full = {c: c for c in classes}
    declared: dict[str, str] = {}
    for a, b in twins.items():
        if not isinstance(a, str) or not isinstance(b, str):
            raise DataError(f"catalog {folder}: {source} should map class names to class names, got {a!r}: {b!r}.")
        for name in (a, b):
            if name not in known:
                raise DataError(
                    f"catalog {folder}: {source} names unknown class '{name}'; classes are {sorted(known)}."
                )
        for x, y in ((a, b), (b, a)):
            if declared.get(x, y) != y:
                raise DataError(
                    f"catalog {folder}: asymmetric twins in {source}: '{x}' is twin of both "
                    f"'{declared[x]}' and '{y}'; a mirror twin pairs exactly two classes."
                )
            declared[x] = y
    full.update(declared)
    return full


def _from_json(folder: Path) -> Catalog:
    path = folder / CATALOG_FILE
    doc = _load_json(path, folder)
    if not isinstance(doc, dict):
        raise DataError(f"catalog {path} should hold a JSON object, got {type(doc).__name__} instead.")
    if doc.get("format") != _FORMAT:
        raise DataError(f"catalog {path} should have \"format\": {_FORMAT}, got {doc.get('format')!r} instead.")
    entries = doc.get("classes")
    if not isinstance(entries, list):
        raise DataError(f"catalog {path} should have a \"classes\" list, got {type(entries).__name__} instead.")
    classes, instances, twins, handed_given = [], [], {}, {}
    families, standards, descriptions = {}, {}, {}
    for k, entry in enumerate(entries):
        if not isinstance(entry, dict) or not isinstance(entry.get("name"), str) or not entry["name"]:
            raise DataError(f"catalog {path}: classes[{k}] should be an object with a \"name\" string.")
        name = entry["name"]
        if name in classes:
            raise DataError(f"catalog {path}: class '{name}' is listed twice.")
        classes.append(name)
        for key, store in (("family", families), ("standard", standards), ("description", descriptions)):
            if key in entry:
                store[name] = str(entry[key])
        if "twin" in entry:
            twins[name] = entry["twin"]
        if "handed" in entry:
            if not isinstance(entry["handed"], bool):
                raise DataError(f"catalog {path}: class '{name}' has \"handed\": {entry['handed']!r}; expected true or false.")
            handed_given[name] = entry["handed"]
        items = entry.get("instances")
        if not isinstance(items, list) or not items:
            raise DataError(f"catalog {path}: class '{name}' has no instances; expected a non-empty \"instances\" list.")
        for j, item in enumerate(items):
            if not isinstance(item, dict) or not isinstance(item.get("file"), str):
                raise DataError(f"catalog {path}: class '{name}' instances[{j}] should be an object with a \"file\" string.")
            file = Path(item["file"])
            file = file if file.is_absolute() else folder / file
            if not file.is_file():
                raise DataError(f"catalog {path} lists missing mesh file {file} (class '{name}').")
            params = item.get("params", {})
            if not isinstance(params, dict):
                raise DataError(f"catalog {path}: class '{name}' instances[{j}] \"params\" should be an object.")
            group = item.get("group", file.stem)
            if not isinstance(group, str) or not group:
                raise DataError(f"catalog {path}: class '{name}' instances[{j}] \"group\" should be a non-empty string.")
            instances.append(Instance(name, file.resolve(), group, dict(params)))
    _check_class_count(classes, folder)
    twins = _check_twins(twins, classes, folder, CATALOG_FILE)
    handed = {c: twins[c] != c for c in classes}
    for c, given in handed_given.items():
        if given != handed[c]:
            twin = twins[c]
            raise DataError(
                f"catalog {path}: class '{c}' says \"handed\": {str(given).lower()} but its twin is "
                + (f"itself; a handed class needs its mirror class as twin." if twin == c
                   else f"'{twin}'; an achiral class is its own twin.")
            )
    return Catalog(
        root=folder,
        classes=tuple(classes),
        twins=twins,
        handed=handed,
        instances=tuple(instances),
        families=families,
        standards=standards,
        descriptions=descriptions,
        title=str(doc.get("title", "")),
        units=str(doc.get("units", "")),
        twins_declared=bool(twins or handed_given),
    )


def _check_class_count(classes, folder: Path) -> None:
    if not classes:
        raise DataError(f"found no classes in {folder}; expected a {CATALOG_FILE} or one sub-folder of meshes per class.")
    if len(classes) == 1:
        raise DataError(f"found 1 class '{classes[0]}' in {folder}; need at least 2.")


def _from_folders(folder: Path) -> Catalog:
    subdirs = sorted(p for p in folder.iterdir() if p.is_dir() and not p.name.startswith((".", "_")))
    classes = [p.name for p in subdirs]
    _check_class_count(classes, folder)
    instances = []
    for sub in subdirs:
        files = sorted(
            p for p in sub.rglob("*")
            if p.is_file() and p.suffix.lower() in MESH_SUFFIXES
            and not any(part.startswith(".") for part in p.relative_to(sub).parts)
        )
        if not files:
            raise DataError(
                f"class '{sub.name}' in {folder} has no mesh files; expected files ending in "
                f"{', '.join(MESH_SUFFIXES)}."
            )
        instances.extend(Instance(sub.name, p.resolve(), p.stem, {}) for p in files)
    twins_path = folder / TWINS_FILE
    declared = {}
    if twins_path.exists():
        declared = _load_json(twins_path, folder)
        if not isinstance(declared, dict):
            raise DataError(f"catalog {folder}: {TWINS_FILE} should hold an object of class -> twin, got {type(declared).__name__}.")
    twins = _check_twins(declared, classes, folder, TWINS_FILE)
    return Catalog(
        root=folder,
        classes=tuple(classes),
        twins=twins,
        handed={c: twins[c] != c for c in classes},
        instances=tuple(instances),
        twins_declared=twins_path.exists(),
    )


def read_catalog(folder: str | os.PathLike) -> Catalog:
    """Read a catalog folder.

    With ``folder/catalog.json`` (format 1, as the demo generator writes it)::

        {"format": 1, "title": "...", "units": "mm",
         "classes": [{"name": "spring_rh", "family": "...", "standard": "...",
                      "twin": "spring_lh", "handed": true, "description": "...",
                      "instances": [{"file": "spring_rh/x.ply", "group": "g", "params": {}}]}]}

    ``file`` is relative to the folder (or absolute); ``group`` defaults to the file stem,
    ``params`` to ``{}``, ``twin`` to the class itself, ``handed`` to ``twin != name`` (when
    given it must agree). Twins may be listed on one side only; the other is implied.

    Without it, each visible sub-folder is a class and every mesh file in it (any depth,
    suffixes as :func:`read_mesh`) an instance whose group is its file stem; an optional
    ``twins.json`` ``{"bracket_left": "bracket_right"}`` declares mirror twins.

    Raises
    ------
    DataError
        Missing folder, fewer than 2 classes, a class without meshes, bad JSON, a twin
        naming an unknown class, asymmetric twins, a listed mesh file that is missing.
    """
    folder = Path(folder).expanduser()
    if not folder.exists():
        raise DataError(f"catalog folder {folder} not found.")
    if not folder.is_dir():
        raise DataError(f"catalog folder {folder} is a file; expected a folder.")
    folder = folder.resolve()
    if (folder / CATALOG_FILE).exists():
        return _from_json(folder)
    return _from_folders(folder)
