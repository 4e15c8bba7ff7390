"""Unit tests of `trainguard.core.paths`: node id -> golden folder.

Properties checked: confined (never outside the golden dir), injective, stable, and every
component valid on common file systems (no separators, NUL or control characters, not
'.'/'..', not a Windows device name, at most 255 bytes). Hostile ids are invented.
"""

from __future__ import annotations

import hashlib
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trainguard.core.paths import MAX_COMPONENT, golden_folder, golden_relpath, safe_component, split_nodeid

#: Device names Windows reserves with or without an extension (Microsoft docs, "Naming Files,
#: Paths, and Namespaces"): CON, PRN, AUX, NUL, COM0-9, LPT0-9.
WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL"} | {f"COM{i}" for i in range(10)} | {f"LPT{i}" for i in range(10)}

#: Characters some common file system rejects in a name (Windows: <>:"/\\|?* and 0-31).
FORBIDDEN = set('<>:"/\\|?*') | {chr(c) for c in range(32)} | {"\x7f"}


def assert_valid_component(name: str) -> None:
    assert name, "empty component"
    assert name not in (".", "..")
    assert not name.startswith("."), name  # no hidden folders either
    assert not name.endswith(".") and not name.endswith(" "), name  # Windows strips these
    assert not (set(name) & FORBIDDEN), name
    assert name.isascii(), name
    assert len(name.encode("utf-8")) <= 255, len(name)
    assert name.split(".")[0].upper() not in WINDOWS_RESERVED, name


def assert_confined(root: Path, nodeid: str) -> Path:
    folder = golden_folder(root, nodeid)
    resolved = folder.resolve()
    assert resolved.is_relative_to(root.resolve()), (nodeid, resolved)
    assert resolved != root.resolve()
    for part in folder.relative_to(root).parts:
        assert_valid_component(part)
    return folder


HOSTILE_IDS = [
    "../../etc/passwd::test_x",
    "tests/../../outside.py::test_x",
    "test_a.py::test_x[../../../escape]",
    "test_a.py::test_x[..]",
    "test_a.py::test_x[.]",
    "/etc/cron.d/job::test_abs",
    "/absolute/path/test_a.py::test_x",
    "C:\\Windows\\System32\\test_a.py::test_x",
    "\\\\server\\share\\test_a.py::test_x",
    "test_a.py::test_x[a/b\\c]",
    "test_a.py::test_x[nul\x00byte]",
    "test_a.py::test_x[tab\tnew\nline\rbell\x07esc\x1b]",
    "test_a.py::test_x[\x7fdel]",
    "test_a.py::CON",
    "test_a.py::nul.txt",
    "con/aux.py::test_x",
    "test_a.py::Lpt1.log",
    "test_a.py::com9",
    "test_a.py::trailing.",
    "test_a.py::trailing ",
    "test_a.py::.hidden",
    "test_a.py::",
    "test_a.py::::test_x",
    "",
    "::",
    "test_a.py::test_x[" + "ü" * 300 + "]",
    "test_a.py::test_x[" + "a" * 400 + "]",
    "test_a.py::test_x[" + "." * 300 + "]",
    "test_a.py::test_x[%2E%2E]",
    "test_a.py::test_x[\U0001f950 croissant \u00e9clair \u6728]",
    "test_a.py::test_x[\ud800lone surrogate]",
    "test_a.py::test_x[<>:\"|?*]",
]


@pytest.mark.parametrize("nodeid", HOSTILE_IDS, ids=range(len(HOSTILE_IDS)))
def test_hostile_ids_stay_inside_the_golden_dir(tmp_path, nodeid):
    root = tmp_path / "golden"
    folder = assert_confined(root, nodeid)
    # the folder can actually be created, and it is a fresh one inside root
    folder.mkdir(parents=True)
    assert folder.is_dir()
    assert folder.resolve().is_relative_to(root.resolve())
    assert not (tmp_path / "etc").exists() and not (tmp_path / "outside.py").exists()


def test_dot_dot_is_escaped_not_followed():
    assert golden_relpath("a/../b.py::t").parts == ("a", "%2E%2E", "b.py", "t")
    assert golden_relpath("../x.py::t").parts == ("%2E%2E", "x.py", "t")
    assert safe_component(".") == "%2E"


def test_plain_ids_map_to_readable_folders():
    # what a user sees in the golden dir: file path, then test name, parametrize id kept
    assert golden_relpath("tests/test_bakery.py::test_oven[rye-0.5]").parts == (
        "tests", "test_bakery.py", "test_oven[rye-0.5]")
    assert golden_relpath("tests/test_depot.py::TestTram::test_delay").parts == (
        "tests", "test_depot.py", "TestTram", "test_delay")


def test_separators_nul_and_control_characters_are_escaped():
    assert safe_component("a/b") == "a%2Fb"
    assert safe_component("a\\b") == "a%5Cb"
    assert safe_component("x\x00y") == "x%00y"
    assert safe_component("\t\n") == "%09%0A"
    assert safe_component("100%") == "100%25"  # the escape character itself is escaped


@pytest.mark.parametrize("name", ["CON", "con", "Con", "nul.txt", "NUL.tar.gz", "aux", "PRN.log", "COM1", "lpt9.x",
                                  "COM0"])
def test_windows_reserved_names_are_changed(name):
    out = safe_component(name)
    assert out != name
    assert out.split(".")[0].upper() not in WINDOWS_RESERVED
    assert_valid_component(out)


@pytest.mark.parametrize("name", ["CONSOLE", "console.py", "nullable", "COM10", "auxiliary"])
def test_names_that_only_start_like_reserved_names_are_kept(name):
    assert safe_component(name) == name


def test_long_names_get_a_stable_hash_suffix():
    text = "test_x[" + "a" * 400 + "]"
    out = safe_component(text)
    assert len(out.encode()) <= 255 and len(out) <= MAX_COMPONENT
    # suffix: '~' + first 16 hex digits of SHA-256 of the UTF-8 text (hashlib, computed here)
    assert out.endswith("~" + hashlib.sha256(text.encode()).hexdigest()[:16])
    assert out.startswith("test_x[aaaa")
    assert safe_component(text) == out
    # a one-character difference anywhere, even past the kept prefix, changes the folder
    assert safe_component(text[:-2] + "b]") != out


def test_long_multibyte_names_fit_in_255_bytes():
    text = "\u6728" * 200  # 600 UTF-8 bytes, 1800 characters once escaped
    out = safe_component(text)
    assert len(out.encode()) <= 255
    assert_valid_component(out)
    assert "%" not in out.split("~")[-1]


_WHOLE_ESCAPES = re.compile(r"(?:[A-Za-z0-9_\-.+=,@\[\]()]|%[0-9A-F]{2})*")


@settings(max_examples=300, deadline=None)
@given(st.integers(0, 12), st.text(st.characters(codec=None, exclude_categories=()), min_size=121, max_size=200))
def test_hashed_names_never_end_their_kept_part_on_a_partial_escape(pad, text):
    out = safe_component("a" * pad + text)
    head, sep, digest = out.rpartition("~")
    assert sep and len(digest) == 16
    assert _WHOLE_ESCAPES.fullmatch(head), out


def test_short_names_are_not_hashed():
    text = "b" * MAX_COMPONENT
    assert safe_component(text) == text


def test_empty_component_does_not_collide_with_an_escaped_nul():
    # 'test_a.py::' has an empty last name; it must not share a folder with a real name
    # that escapes to the same text.
    assert golden_relpath("test_a.py::") != golden_relpath("test_a.py::\x00empty")
    assert safe_component("") != safe_component("\x00empty")
    assert_valid_component(safe_component(""))


def test_mapping_is_stable_across_processes(tmp_path):
    ids = ["tests/test_bakery.py::test_oven[rye]", "test_a.py::test_x[" + "\u00fc" * 300 + "]", "test_a.py::CON"]
    here = [golden_relpath(i).as_posix() for i in ids]
    code = (
        "import sys, json; from trainguard.core.paths import golden_relpath; "
        "print(json.dumps([golden_relpath(i).as_posix() for i in json.loads(sys.argv[1])]))"
    )
    import json

    env = dict(os.environ, PYTHONHASHSEED="12345")
    out = subprocess.run([sys.executable, "-c", code, json.dumps(ids)], capture_output=True, text=True, env=env,
                         check=True, cwd=tmp_path)
    assert json.loads(out.stdout) == here


def test_split_nodeid():
    assert split_nodeid("a/b/test_c.py::TestD::test_e[x::y]") == ["a", "b", "test_c.py", "TestD", "test_e[x", "y]"]
    assert split_nodeid("a\\b.py::t") == ["a", "b.py", "t"]


# -- properties (Hypothesis) -----------------------------------------------------------

#: Any code point, surrogates included (lone surrogates can reach a node id via ids=).
any_text = st.text(st.characters(codec=None, exclude_categories=()), max_size=300)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(any_text)
def test_every_component_is_valid(text):
    assert_valid_component(safe_component(text))


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(any_text)
def test_every_id_is_confined(tmp_path, text):
    assert_confined(tmp_path / "golden", text)
    assert_confined(tmp_path / "golden", "tests/test_a.py::" + text)
    assert_confined(tmp_path / "golden", text + "::test_x")


@settings(max_examples=200, deadline=None)
@given(st.lists(any_text, min_size=2, max_size=400, unique=True))
def test_safe_component_is_injective(texts):
    names = [safe_component(t) for t in texts]
    assert len(set(names)) == len(texts)


@settings(max_examples=200, deadline=None)
@given(st.sampled_from(["", "\x00empty", "%00empty", ".", "%2E", "..", "CON", "%43ON", "a.", "a%2E", "~", "%7E"]),
       st.sampled_from(["", "\x00empty", "%00empty", ".", "%2E", "..", "CON", "%43ON", "a.", "a%2E", "~", "%7E"]))
def test_safe_component_is_injective_on_edge_cases(a, b):
    if a != b:
        assert safe_component(a) != safe_component(b)


# Node ids as pytest builds them: a relative file path of non-empty components joined
# with '/', then '::'-separated names. File components contain no separators or ':';
# directories never end in '.py' and names never do, so that the split into file path
# and names is unambiguous (see test_split_nodeid for why ids outside this form may not be).
_component = st.text(st.characters(codec=None, exclude_categories=(), exclude_characters="/\\:"), min_size=1,
                     max_size=40)
_dir = _component.filter(lambda s: not s.endswith(".py"))
_name = st.text(st.characters(codec=None, exclude_categories=(), exclude_characters=":"), min_size=1,
                max_size=200).filter(lambda s: not s.endswith(".py"))
_nodeid = st.builds(
    lambda dirs, stem, names: "/".join(dirs + [stem + ".py"]) + "::" + "::".join(names),
    st.lists(_dir, max_size=3),
    _component,
    st.lists(_name, min_size=1, max_size=3),
)


@settings(max_examples=60, deadline=None)
@given(st.lists(_nodeid, min_size=50, max_size=300, unique=True))
def test_golden_relpath_is_injective_on_node_ids(ids):
    folders = {golden_relpath(i) for i in ids}
    assert len(folders) == len(ids)
    # stable: same input, same folder
    assert [golden_relpath(i) for i in ids] == [golden_relpath(i) for i in ids]


@settings(max_examples=30, deadline=None)
@given(st.lists(st.text(st.characters(codec=None, exclude_categories=()), max_size=30), min_size=200, max_size=600,
                unique=True))
def test_parametrize_ids_of_one_test_never_share_a_folder(param_ids):
    folders = {golden_relpath(f"tests/test_depot.py::test_tram[{p}]") for p in param_ids}
    assert len(folders) == len(param_ids)
