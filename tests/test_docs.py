"""Documentation: README promises, the quick start, safety cautions and the CLI reference."""

from __future__ import annotations

import importlib.util
import re
from pathlib import Path

import pytest

from fringe.cli import build_parser
from fringe.result import MEASURED_KEYS

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
CLI_MD = ROOT / "docs" / "cli.md"
GENERATOR = ROOT / "docs" / "make_cli_reference.py"

# The two set-up commands of the quick start; the CI script runs the second one verbatim.
INSTALL_AND_DEMO = "python -m pip install -e . && fringe demo"
INSTALL_AND_TEST = "python -m pip install -e '.[test]' && python -m pytest"

# Documents that README links to before they are written (listed in its Status section).
PLANNED_LINKS: set[str] = set()  # links to documents still to be written


def _text(path: Path) -> str:
    return path.read_text(encoding="utf-8")


def _without_code(text: str) -> str:
    """The text with fenced code blocks removed (so that '#' comments are not headings)."""
    return re.sub(r"^```.*?^```[ \t]*$", "", text, flags=re.S | re.M)


def _section(text: str, title: str) -> str:
    """Body of the first heading whose text starts with `title`, up to the next heading of
    the same or a higher level. Headings inside fenced code blocks are ignored."""
    lines = text.splitlines()
    in_code = False
    start = level = None
    for i, line in enumerate(lines):
        if line.startswith("```"):
            in_code = not in_code
            continue
        if in_code:
            continue
        m = re.match(r"^(#+)\s+(.*)$", line)
        if not m:
            continue
        if start is None:
            if m.group(2).strip().lower().startswith(title.lower()):
                start, level = i + 1, len(m.group(1))
        elif len(m.group(1)) <= level:
            return "\n".join(lines[start:i])
    if start is None:
        raise AssertionError(f"README.md has no heading starting with {title!r}")
    return "\n".join(lines[start:])


def _fenced_blocks(text: str) -> list[str]:
    return [b.strip() for b in re.findall(r"^```[^\n]*\n(.*?)^```[ \t]*$", text,
                                          flags=re.S | re.M)]


def _first_paragraph(text: str) -> str:
    for block in re.split(r"\n\s*\n", _without_code(text)):
        block = block.strip()
        if block and not block.startswith("#") and not block.startswith("["):
            return block
    raise AssertionError("README.md has no paragraph")


def _generator():
    spec = importlib.util.spec_from_file_location("make_cli_reference", GENERATOR)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _measure_parser():
    parser = build_parser()
    for action in parser._actions:
        choices = getattr(action, "choices", None)
        if isinstance(choices, dict) and "measure" in choices:
            return choices["measure"]
    raise AssertionError("fringe.cli.build_parser() has no 'measure' command")


def test_first_paragraph_states_the_job():
    # Common practice: a README opens with who the tool is for and what it does.
    para = _first_paragraph(_text(README)).lower()
    for word in ("fringe", "visibility", "phase", "uncertaint", "cpu"):
        assert word in para, f"first paragraph does not mention {word!r}"
    for user in ("teaching", "interferometer", "photon-counting"):
        assert user in para, f"first paragraph does not name the {user!r} users"


def test_quick_start_holds_exactly_the_two_setup_commands():
    # Common practice: a quick start a fresh machine can paste, one command per block.
    blocks = _fenced_blocks(_section(_text(README), "Quick start"))
    assert blocks == [INSTALL_AND_DEMO, INSTALL_AND_TEST]


def test_ci_runs_the_readme_test_command():
    # The CI entry point must run what README tells a new user to run.
    ci = ROOT / ".ci" / "run"
    if not ci.exists():
        pytest.skip("no CI script in this checkout")
    assert INSTALL_AND_TEST in _text(ci)


def test_readme_safety_section():
    # Laser practice: ANSI Z136.5-2020 (Safe Use of Lasers in Educational Institutions) and
    # IEC 60825-1:2014 (edition from memory); the points themselves are common practice.
    # Eclipse viewers are for the naked eye only: ISO 12312-2:2015.
    safety = _section(_text(README), "Safety").lower()
    for phrase in ("laser safety officer", "solar filter", "reflections", "class",
                   "below eye level", "jewellery", "matte", "attenuate", "eclipse glasses",
                   "pinhole", "local rules"):
        assert phrase in safety, f"README safety section does not mention {phrase!r}"


@pytest.mark.parametrize("doc", ["docs/safety.md", "docs/capture-guide.md"])
def test_other_documents_repeat_the_cautions(doc):
    # Common practice: every guide that sends people to a bench repeats the cautions.
    text = _text(ROOT / doc).lower()
    for phrase in ("laser safety officer", "solar filter", "reflections"):
        assert phrase in text, f"{doc} does not mention {phrase!r}"


def test_cli_reference_is_up_to_date():
    # docs/cli.md is generated; regenerate it with `python docs/make_cli_reference.py`.
    assert _text(CLI_MD) == _generator().render(), (
        "docs/cli.md is out of date: run python docs/make_cli_reference.py")


def test_cli_reference_lists_every_measure_option():
    text = _text(CLI_MD)
    options = [s for a in _measure_parser()._actions for s in a.option_strings]
    assert "--roi" in options and "--dark" in options  # the parser was found
    missing = [s for s in options if f"`{s}`" not in text]
    assert not missing, f"docs/cli.md does not list {missing}"


def test_cli_reference_does_not_depend_on_terminal_width(monkeypatch):
    # argparse's own formatter reads COLUMNS; the generator must not.
    gen = _generator()
    monkeypatch.setenv("COLUMNS", "40")
    narrow = gen.render()
    monkeypatch.setenv("COLUMNS", "250")
    assert gen.render() == narrow


def test_readme_documents_every_measured_key():
    # Every always-reported quantity and its uncertainty partner appears in the README.
    text = _text(README)
    for key in MEASURED_KEYS:
        assert f"`{key}`" in text and f"`{key}_err`" in text, f"README lacks {key}"
    for key in ("file", "frame", "status", "error", "warnings", "snr", "saturated_fraction"):
        assert f"`{key}`" in text, f"README lacks {key}"


def test_readme_states_the_conventions():
    # The conventions the code uses (fringe.orient, fringe.profile docstrings).
    text = _text(README)
    for phrase in ("((W-1)/2, (H-1)/2)", "n = (cos t, -sin t)", "[0, 180)",
                   "I(r) = B + A cos(2 pi n.(r - c)/P + phi)"):
        assert phrase in text, f"README does not state {phrase!r}"


def test_relative_links_resolve():
    # Every relative link in README and docs/ points to a file of the repository, except
    # documents announced as planned.
    docs = [README, ROOT / "DEVELOPERS.md", *sorted((ROOT / "docs").glob("*.md"))]
    broken = []
    for doc in docs:
        for target in re.findall(r"\]\(([^)\s]+)\)", _without_code(_text(doc))):
            if re.match(r"^[a-z]+:", target) or target.startswith("#"):
                continue
            path = (doc.parent / target.split("#")[0]).resolve()
            rel = path.relative_to(ROOT).as_posix() + ("/" if target.endswith("/") else "")
            if not path.exists() and rel not in PLANNED_LINKS:
                broken.append(f"{doc.name}: {target}")
    assert not broken, f"broken links: {broken}"


def test_documented_commands_exist():
    # Commands and options quoted in README's usage examples must be ones the parser knows.
    parser = build_parser()
    text = _section(_text(README), "Using it")
    for block in _fenced_blocks(text):
        command = " ".join(line.rstrip("\\").strip() for line in block.splitlines()
                           if line.strip() and not line.lstrip().startswith("#"))
        for cmd in re.split(r"(?=\bfringe (?:measure|calib|demo)\b)", command):
            cmd = cmd.split("#")[0].strip()
            if not cmd.startswith("fringe "):
                continue
            args = cmd.split()[1:]
            try:
                parser.parse_args(args)
            except SystemExit as exc:  # argparse exits on unknown options
                raise AssertionError(f"README example does not parse: {cmd}") from exc
