"""Mapping pytest node ids to golden folders that are safe on every file system.

A node id is arbitrary text once parametrization is involved: `../`, slashes, NUL,
Windows device names, 500-character ids. The mapping here is injective (two ids never
share a folder), stable (the same id always gives the same folder), and confined (no
id reaches outside the golden dir), so a hostile test id cannot overwrite anything.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

#: Characters kept as they are in a folder name; everything else is %XX-escaped (UTF-8).
_SAFE = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-.+=,@[]()")
#: Names Windows reserves for devices, with or without an extension.
_RESERVED = {"CON", "PRN", "AUX", "NUL"} | {f"COM{i}" for i in range(10)} | {f"LPT{i}" for i in range(10)}
#: Longest component kept verbatim; 255 bytes is the usual limit, leave room for temp suffixes.
MAX_COMPONENT = 120


def _escape(text: str) -> str:
    out = []
    for ch in text:
        if ch in _SAFE:
            out.append(ch)
        else:
            out.extend(f"%{b:02X}" for b in ch.encode("utf-8", "surrogatepass"))
    return "".join(out)


def safe_component(text: str) -> str:
    """One path component: escaped, never empty, '.', '..', hidden, reserved or too long."""
    name = _escape(text)
    if not name:
        name = "%empty"  # '%' + lowercase is never produced by escaping ("%00empty" was: the text "\x00empty")
    if name.startswith("."):
        name = "%2E" + name[1:]
    if name.endswith("."):
        name = name[:-1] + "%2E"
    if name.split(".")[0].upper() in _RESERVED:
        name = f"%{ord(name[0]):02X}" + name[1:]
    if len(name) > MAX_COMPONENT:
        digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:16]
        head = name[: MAX_COMPONENT - 18]
        cut = head.rfind("%", len(head) - 2)
        if cut != -1:  # never end on a dangling escape such as "%E"
            head = head[:cut]
        name = head + "~" + digest
    return name


def split_nodeid(nodeid: str) -> list[str]:
    """Split a node id into path parts: the file's path components, then the ::-separated names."""
    file_part, *names = nodeid.split("::")
    parts = [p for p in file_part.replace("\\", "/").split("/") if p != ""]
    return parts + names


def golden_relpath(nodeid: str) -> Path:
    """The folder, relative to the golden dir, that holds the goldens of `nodeid`."""
    parts = split_nodeid(nodeid)
    if not parts:
        parts = [""]
    return Path(*[safe_component(p) for p in parts])


def golden_folder(golden_dir: str | os.PathLike[str], nodeid: str) -> Path:
    root = Path(golden_dir)
    return root / golden_relpath(nodeid)
