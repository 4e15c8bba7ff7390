"""`trainguard audit --since REV`: what a pull request did to the goldens, for its reviewers.

A content digest proves that trainguard wrote a file, not that the file should be trusted:
anyone can re-bless, and anyone who reads the format's documentation can recompute a
digest. What protects a project is review, so this tool puts everything that changes what
the guard accepts in front of the reviewer, between REV and the work tree:

- goldens added, removed or re-blessed, with each bless's reason and time;
- metrics and state entries that disappeared from a re-blessed golden;
- tolerances that got looser or tighter: each golden's recorded and calibrated tolerances,
  the `trainguard` marker of every test function in changed Python files, and the ini
  options `trainguard_rtol` / `trainguard_atol`; a removed marker counts as looser;
- files in the golden dir that trainguard never leaves there (temp files, commit records).

Exit status 1 when a tolerance got looser, a golden or marker was removed, or a golden is
unreadable, so CI can demand a label or a second reviewer; 0 otherwise.
"""

from __future__ import annotations

import ast
import configparser
import math
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any

from ..core import golden_format as fmt
from ..core.atomic import COMMIT_FILE, LOCK_FILE
from ..core.errors import TrainguardError
from ..core.meta import GoldenMeta
from ..core.records import Run
from ..core.settings import calibrated_policy
from ..core.store import GoldenStore
from ..core.text import md_code, md_escape, table, untrusted
from ..core.tolerance import DEFAULT_ATOL, DEFAULT_RTOL, Policy
from . import git_history as git

LOOSER, TIGHTER = "looser", "tighter"


@dataclass
class Finding:
    """One line of the audit: what, where, and whether it needs a second look (`flag`)."""

    kind: str  # "golden added", "golden removed", "re-blessed", "tolerance looser", ...
    where: str
    detail: str = ""
    flag: bool = False


@dataclass
class Audit:
    rev: str
    commit: str
    golden_dir: Path
    findings: list[Finding] = field(default_factory=list)

    @property
    def flagged(self) -> list[Finding]:
        return [f for f in self.findings if f.flag]

    def add(self, kind: str, where: str, detail: str = "", flag: bool = False) -> None:
        self.findings.append(Finding(kind, where, detail, flag))


# -- goldens ---------------------------------------------------------------------------------------


def _old_goldens(root: Path, commit: str, store: GoldenStore, audit: Audit) -> dict[str, Run | None]:
    """Golden folders at `commit`, by path relative to the golden dir (None: unreadable there)."""
    by_folder: dict[str, dict[str, bytes]] = {}
    golden_rel = PurePosixPath(store.root.resolve().relative_to(root.resolve()).as_posix())
    for rel in git.files_at(root, commit, store.root):
        path = PurePosixPath(rel)
        if path.name not in fmt.KINDS:
            continue
        folder = str(path.parent.relative_to(golden_rel)) if golden_rel != PurePosixPath(".") else str(path.parent)
        data = git.show(root, commit, rel, store.max_bytes)
        if data is not None:
            by_folder.setdefault(folder, {})[path.name] = data
    out: dict[str, Run | None] = {}
    for folder, blobs in sorted(by_folder.items()):
        try:
            out[folder] = store.read_snapshot(store.root / folder, blobs)
        except TrainguardError:
            out[folder] = None  # unreadable in history: report the work tree's side only
    return out


def _new_goldens(store: GoldenStore, audit: Audit) -> dict[str, Run | None]:
    out: dict[str, Run | None] = {}
    for folder in store.find():
        rel = str(folder.relative_to(store.root))
        try:
            out[rel] = store.read(folder)
        except TrainguardError as exc:
            out[rel] = None
            audit.add("unreadable golden", rel, getattr(exc, "problem", str(exc)), flag=True)
    return out


def _stray_files(store: GoldenStore, audit: Audit) -> None:
    """Files trainguard never leaves in a golden dir: a reader might be made to read them."""
    if not store.root.is_dir():
        return
    expected = {*fmt.KINDS, LOCK_FILE}
    for path in sorted(store.root.rglob("*")):
        if path.is_symlink():
            audit.add("symbolic link in the golden dir", str(path.relative_to(store.root)), "goldens are never links",
                      flag=True)
        elif path.is_file() and (path.name not in expected or path.name == COMMIT_FILE):
            what = ("an interrupted write's commit record" if path.name == COMMIT_FILE
                    else "a temp file" if path.name.startswith(".tmp-") else "not a golden file")
            audit.add("unexpected file", str(path.relative_to(store.root)), f"{what}; never commit it", flag=True)


def _identity(run: Run) -> tuple[Any, ...]:
    """What makes two goldens the same bless: data and metadata (run ids differ on every write)."""
    meta = run.meta.to_json()
    meta.pop("fingerprint", None)
    return (sorted((n, s.steps.tobytes(), s.values.tobytes()) for n, s in run.metrics.items()),
            sorted((n, t.sha256, t.dtype, t.shape) for n, t in run.tensors.items()), sorted(map(str, meta.items())))


def _effective(meta: GoldenMeta) -> Policy:
    return calibrated_policy(Policy.from_json(meta.get("tolerances")), meta)


def _compare_policies(old: Policy, new: Policy) -> list[tuple[str, str, str]]:
    """(part, old, new, looser|tighter) for every tolerance that changed."""
    changes = []
    if old.exact != new.exact:
        changes.append(("exact", str(old.exact), str(new.exact), LOOSER if old.exact else TIGHTER))
    for attr in ("rtol", "atol"):
        a, b = getattr(old.default, attr), getattr(new.default, attr)
        if a != b:
            changes.append((f"{attr} ({new.source})", f"{a:g}", f"{b:g}", LOOSER if b > a else TIGHTER))
    for name in sorted(set(old.metrics or {}) | set(new.metrics or {})):
        a_tol, b_tol = old.for_metric(name), new.for_metric(name)
        for attr in ("rtol", "atol"):
            a, b = getattr(a_tol, attr), getattr(b_tol, attr)
            if a != b:
                changes.append((f"{name} {attr}", f"{a:g}", f"{b:g}", LOOSER if b > a else TIGHTER))
    return changes  # type: ignore[return-value]


def _goldens(audit: Audit, old: dict[str, Run | None], new: dict[str, Run | None]) -> None:
    for folder in sorted(set(old) | set(new)):
        o, n = old.get(folder), new.get(folder)
        if folder not in new:
            audit.add("golden removed", folder, "its test is no longer guarded against it", flag=True)
            continue
        if n is None:
            continue  # reported as unreadable already
        reason = untrusted(n.meta.get("reason") or "(no reason given)")
        when = untrusted(n.meta.get("blessed_at") or "?")
        adopted = f"; adopted from {untrusted(n.meta['adopted_from'])}" if n.meta.get("adopted_from") else ""
        if folder not in old:
            audit.add("golden added", folder, f"blessed {when}: {reason}{adopted}")
            continue
        if o is None or _identity(o) == _identity(n):
            continue
        audit.add("re-blessed", folder, f"blessed {when}: {reason}{adopted}")
        gone_metrics = sorted(set(o.metrics) - set(n.metrics))
        gone_state = sorted(set(o.tensors) - set(n.tensors))
        if gone_metrics:
            audit.add("metrics gone", folder, ", ".join(map(untrusted, gone_metrics)))
        if gone_state:
            shown = ", ".join(map(untrusted, gone_state[:8])) + (f" and {len(gone_state) - 8} more"
                                                                 if len(gone_state) > 8 else "")
            audit.add("state entries gone", folder, shown)
        for part, a, b, way in _compare_policies(_effective(o.meta), _effective(n.meta)):
            audit.add(f"tolerance {way}", folder, f"{part}: {a} -> {b}", flag=way == LOOSER)


# -- markers and ini ------------------------------------------------------------------------------


def _markers(source: str) -> dict[str, dict[str, Any]] | None:
    """The `trainguard` marker arguments of every test in a Python file, by qualified name (None: no parse)."""
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return None
    out: dict[str, dict[str, Any]] = {}

    def marker_args(node: ast.expr) -> dict[str, Any] | None:
        call = node if isinstance(node, ast.Call) else None
        target = call.func if call else node
        if not (isinstance(target, ast.Attribute) and target.attr == "trainguard"):
            return None
        args: dict[str, Any] = {}
        for kw in call.keywords if call else []:
            if kw.arg in ("rtol", "atol", "exact", "metrics"):
                try:
                    args[kw.arg] = ast.literal_eval(kw.value)
                except (ValueError, SyntaxError, TypeError):
                    args[kw.arg] = ast.unparse(kw.value)  # not a literal: compared as text
        return args

    def visit(body: list[ast.stmt], prefix: str, inherited: dict[str, Any] | None) -> None:
        for node in body:
            if isinstance(node, ast.Assign) and any(isinstance(t, ast.Name) and t.id == "pytestmark" for t in node.targets):
                values = node.value.elts if isinstance(node.value, (ast.List, ast.Tuple)) else [node.value]
                for v in values:
                    found = marker_args(v)
                    if found is not None:
                        out[prefix + "<module>" if not prefix else prefix + "<class>"] = found
        for node in body:
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
                mine = inherited
                for dec in node.decorator_list:
                    found = marker_args(dec)
                    if found is not None:
                        mine = found
                name = prefix + node.name
                if isinstance(node, ast.ClassDef):
                    visit(node.body, name + "::", mine)
                elif mine is not None and node.name.startswith("test"):
                    out[name] = mine

    visit(tree.body, "", None)
    return out


def _ini_tolerances(text: str | None, name: str) -> dict[str, float]:
    """trainguard_rtol / trainguard_atol from a pyproject.toml, pytest.ini, tox.ini or setup.cfg text."""
    if not text:
        return {}
    raw: dict[str, Any] = {}
    if name == "pyproject.toml":
        try:
            import tomllib
        except ImportError:  # Python 3.10
            return {}
        try:
            raw = tomllib.loads(text).get("tool", {}).get("pytest", {}).get("ini_options", {}) or {}
        except ValueError:
            return {}
    else:
        parser = configparser.ConfigParser()
        try:
            parser.read_string(text)
        except configparser.Error:
            return {}
        section = "tool:pytest" if name == "setup.cfg" else "pytest"
        raw = dict(parser[section]) if parser.has_section(section) else {}
    out = {}
    for key in ("trainguard_rtol", "trainguard_atol"):
        try:
            out[key] = float(raw[key])
        except (KeyError, TypeError, ValueError):
            pass
    return out


def _value(args: dict[str, Any], key: str, ini: dict[str, float]) -> Any:
    if key in args:
        return args[key]
    return ini.get(f"trainguard_{key}", DEFAULT_RTOL if key == "rtol" else DEFAULT_ATOL)


def _marker_changes(audit: Audit, path: str, old: dict[str, dict[str, Any]], new: dict[str, dict[str, Any]],
                    old_ini: dict[str, float], new_ini: dict[str, float]) -> None:
    for test in sorted(set(old) | set(new)):
        where = f"{path}::{test}"
        if test not in new:
            audit.add("marker removed", where, "the test is no longer guarded (or was deleted)", flag=True)
            continue
        if test not in old:
            audit.add("marker added", where, _describe_args(new[test]))
            continue
        a, b = old[test], new[test]
        if a.get("exact") is True and b.get("exact") is not True:
            audit.add("tolerance looser", where, "exact=True removed", flag=True)
        for key in ("rtol", "atol"):
            va, vb = _value(a, key, old_ini), _value(b, key, new_ini)
            if va != vb:
                way = _way(va, vb)
                audit.add(f"tolerance {way}", where, f"marker {key}: {untrusted(va)} -> {untrusted(vb)}",
                          flag=way == LOOSER)
        if a.get("metrics") != b.get("metrics"):
            way = _metrics_way(a.get("metrics"), b.get("metrics"))
            audit.add(f"tolerance {way}", where, f"marker metrics: {untrusted(a.get('metrics'))} -> "
                      f"{untrusted(b.get('metrics'))}", flag=way != TIGHTER)


def _way(a: Any, b: Any) -> str:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and math.isfinite(a) and math.isfinite(b):
        return LOOSER if b > a else TIGHTER
    return "changed"  # not literals: a reviewer must read them


def _metrics_way(a: Any, b: Any) -> str:
    """Per-metric tolerances in a marker: looser when an entry was added or a number grew."""
    a = a if isinstance(a, dict) else {}
    b = b if isinstance(b, dict) else {}
    way = TIGHTER
    for name, spec in b.items():
        old = a.get(name)
        if not isinstance(spec, dict) or not isinstance(old, dict):
            return LOOSER if old is None else "changed"  # a new per-metric entry can only widen that metric
        for key in ("rtol", "atol"):
            if key in spec and spec.get(key) != old.get(key):
                if _way(old.get(key, 0.0), spec[key]) != TIGHTER:
                    return _way(old.get(key, 0.0), spec[key])
    return way


def _describe_args(args: dict[str, Any]) -> str:
    return ", ".join(f"{k}={untrusted(v)}" for k, v in sorted(args.items())) or "default tolerances"


def _code(audit: Audit, root: Path, commit: str, max_bytes: int) -> None:
    changed = git.changed_files(root, commit)
    ini_names = ("pyproject.toml", "pytest.ini", "tox.ini", "setup.cfg")
    old_ini: dict[str, float] = {}
    new_ini: dict[str, float] = {}
    for name in ini_names:
        old_text = git.show(root, commit, name, max_bytes)
        new_path = root / name
        old_ini.update(_ini_tolerances(old_text.decode("utf-8", "replace") if old_text else None, name))
        new_ini.update(_ini_tolerances(new_path.read_text("utf-8", "replace") if new_path.is_file() else None, name))
    for key in ("trainguard_rtol", "trainguard_atol"):
        a = old_ini.get(key, DEFAULT_RTOL if key.endswith("rtol") else DEFAULT_ATOL)
        b = new_ini.get(key, DEFAULT_RTOL if key.endswith("rtol") else DEFAULT_ATOL)
        if a != b:
            way = _way(a, b)
            audit.add(f"tolerance {way}", "ini", f"{key}: {a:g} -> {b:g} (every guarded test without its own)",
                      flag=way == LOOSER)
    for rel in changed:
        if not rel.endswith(".py"):
            continue
        old_src = git.show(root, commit, rel, max_bytes)
        new_path = root / rel
        new_src = new_path.read_bytes() if new_path.is_file() and not new_path.is_symlink() else None
        old = _markers(old_src.decode("utf-8", "replace")) if old_src else {}
        new = _markers(new_src.decode("utf-8", "replace")) if new_src else {}
        if old is None or new is None:
            audit.add("unparsable test file", rel, "markers not compared: read the change by hand", flag=True)
            continue
        _marker_changes(audit, rel, old, new, old_ini, new_ini)


# -- entry ----------------------------------------------------------------------------------------


def run_audit(since: str, golden_dir: Path, max_bytes: int = fmt.DEFAULT_MAX_FILE_BYTES) -> Audit:
    """Everything that changes what the guard accepts, between `since` and the work tree."""
    root = git.repo_root(golden_dir if golden_dir.exists() else Path.cwd())
    if root is None:
        raise TrainguardError(f"{golden_dir}: not inside a git work tree; audit compares with a revision's goldens")
    commit = git.resolve_rev(root, since)
    store = GoldenStore(golden_dir, max_bytes=max_bytes, read_only=True)
    audit = Audit(since, commit, golden_dir)
    old = _old_goldens(root, commit, store, audit)
    new = _new_goldens(store, audit)
    _stray_files(store, audit)
    _goldens(audit, old, new)
    _code(audit, root, commit, max_bytes)
    return audit


_ORDER = ("golden removed", "marker removed", "tolerance looser", "unreadable golden", "unexpected file",
          "symbolic link in the golden dir", "unparsable test file", "tolerance changed", "metrics gone",
          "state entries gone", "re-blessed", "golden added", "marker added", "tolerance tighter")


def _sorted(findings: list[Finding]) -> list[Finding]:
    rank = {k: i for i, k in enumerate(_ORDER)}
    return sorted(findings, key=lambda f: (not f.flag, rank.get(f.kind, len(rank)), f.where))


def render_text(audit: Audit) -> str:
    head = (f"trainguard audit: goldens and tolerances in {audit.golden_dir}, {audit.rev} ({audit.commit[:12]}) "
            "-> work tree")
    if not audit.findings:
        return head + "\nno golden, tolerance or marker changed."
    rows = [["!" if f.flag else "", f.kind, f.where, f.detail] for f in _sorted(audit.findings)]
    tail = (f"{len(audit.flagged)} change(s) need a second look (looser tolerance, removed golden or marker, "
            "unreadable or unexpected file): exit 1" if audit.flagged else "nothing loosened or removed: exit 0")
    return "\n".join([head, table(["", "change", "where", "detail"], rows), tail])


def render_markdown(audit: Audit) -> str:
    lines = ["## trainguard audit", "",
             f"Goldens and tolerances in {md_code(audit.golden_dir)}, {md_code(audit.rev)} "
             f"({md_code(audit.commit[:12])}) to this change."]
    if not audit.findings:
        return "\n".join([*lines, "", "No golden, tolerance or marker changed."]) + "\n"
    if audit.flagged:
        lines += ["", f"**{len(audit.flagged)} change(s) need a second look** (looser tolerance, removed golden or "
                  "marker, unreadable or unexpected file)."]
    lines += ["", "| | change | where | detail |", "| --- | --- | --- | --- |"]
    for f in _sorted(audit.findings):
        lines.append(f"| {'⚠️' if f.flag else ''} | {md_escape(f.kind)} | {md_code(f.where)} | {md_escape(f.detail)} |")
    return "\n".join(lines) + "\n"
