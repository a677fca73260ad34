"""Built-in profiles (species, lasers, generators, scenarios) and path lookup.

The built-in profiles ship inside the package as ``sweepgen.profiles`` (TOML data
only). Wherever a file names a profile, the value is either the key of a
built-in profile (the file name without ``.toml``) or a path to the user's own
file, relative to the file that names it.
"""

from __future__ import annotations

import importlib.resources
from pathlib import Path

from sweepgen.errors import InputError, display_path

KINDS = ("species", "lasers", "generators", "scenarios")
#: one profile of each kind, as a message names it
SINGULAR = {"species": "species", "lasers": "laser", "generators": "generator", "scenarios": "scenario"}


def builtin_dir(kind: str):
    """The folder of built-in profiles of one kind (a Traversable)."""
    if kind not in KINDS:
        raise ValueError(kind)
    return importlib.resources.files("sweepgen.profiles").joinpath(kind)


def builtin_keys(kind: str) -> list[str]:
    """Sorted keys of the built-in profiles of one kind."""
    folder = builtin_dir(kind)
    return sorted(p.name[:-5] for p in folder.iterdir() if p.name.endswith(".toml"))


def resolve(kind: str, ref, *, relative_to=None, file=None, key=None) -> Path:
    """Find the file meant by ``ref``: a built-in key or a path.

    Parameters
    ----------
    kind : str
        One of :data:`KINDS`.
    ref : str
        A built-in key (``"rb87-d2"``) or a path (``"../my-laser.toml"``).
    relative_to : path, optional
        The folder a relative path is taken from (the naming file's folder);
        without it, the current folder. A path named inside a file is never
        looked up in the current folder, so a file of the same name there cannot
        stand in for the one the scenario means.
    file, key : str, optional
        Where ``ref`` was written, for the error message.
    """
    if not isinstance(ref, str) or not ref.strip():
        raise InputError(f"expected the name of a built-in {SINGULAR.get(kind, kind)} profile or a path to a TOML file, "
                         f"got {ref!r}", file=file, key=key)
    candidates = []
    path = Path(ref).expanduser()
    if path.is_absolute():
        candidates.append(path)
    elif relative_to is not None:
        candidates.append(Path(relative_to) / path)
    else:
        candidates.append(Path.cwd() / path)
    looks_like_path = ref.endswith(".toml") or "/" in ref or "\\" in ref
    for candidate in candidates:
        if candidate.is_file():
            return candidate
    if not looks_like_path:
        entry = builtin_dir(kind).joinpath(f"{ref}.toml")
        if entry.is_file():
            return Path(str(entry))
    known = ", ".join(builtin_keys(kind))
    looked = f"looked for the file at {display_path(candidates[0])}; " if looks_like_path else ""
    raise InputError(f"no built-in {SINGULAR.get(kind, kind)} profile or file named {ref!r} ({looked}built-in: {known})",
                     file=file, key=key)


def title_of(path: Path) -> str:
    """The ``title`` (or ``name``) line of a profile, for listings; empty if absent."""
    from sweepgen._config import load_toml

    try:
        data = load_toml(path)
    except InputError:
        return "(unreadable)"
    return str(data.get("title") or data.get("name") or "")
