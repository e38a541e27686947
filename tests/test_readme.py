"""README.md works as written (issue 15, item 7): its code runs and its quoted output is current.

* Every ```python block runs, top to bottom in one namespace (as a reader who pastes them in
  order), in a scratch working directory.
* Every ``mfbridge`` command line of a ```bash block composes: its overrides are valid (no
  solve; a sweep ``-m a=1,2`` is checked with its first value).
* A ```text block preceded by ``<!-- readme-test: output -->`` quotes what its ``$ ...``
  commands print: every quoted line must match a printed line (numbers in the quote are
  compared to the digits shown; times in seconds, dates and paths holding digits are not
  compared). The default scenario's block runs here; blocks marked
  ``<!-- readme-test: output slow -->`` run with ``pytest -m slow``.

Markers: ``<!-- readme-test: slow -->`` before a python block moves it to the slow suite,
``<!-- readme-test: skip -->`` leaves a block out (say why next to it in the README).
Whoever changes what a quoted command prints updates the README in the same commit.
"""

from __future__ import annotations

import logging
import os
import re
import shlex
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"
MARKER = re.compile(r"<!--\s*readme-test:\s*([\w ]+?)\s*-->")
NUMBER = r"[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?"


@dataclass(frozen=True)
class Block:
    language: str
    text: str
    line: int  # line number of the opening fence (1-based)
    marks: frozenset[str]


def readme_blocks(text: str) -> list[Block]:
    """The fenced code blocks of a markdown text with the marker words just above each."""
    blocks: list[Block] = []
    lines = text.splitlines()
    i = 0
    while i < len(lines):
        fence = re.match(r"^```(\w*)\s*$", lines[i])
        if not fence:
            i += 1
            continue
        j = i + 1
        while j < len(lines) and not lines[j].startswith("```"):
            j += 1
        marks: set[str] = set()
        k = i - 1
        while k >= 0 and (not lines[k].strip() or MARKER.search(lines[k])):
            if (found := MARKER.search(lines[k])) is not None:
                marks |= set(found.group(1).split())
            k -= 1
        blocks.append(Block(fence.group(1), "\n".join(lines[i + 1:j]), i + 1, frozenset(marks)))
        i = j + 1
    return blocks


BLOCKS = readme_blocks(README.read_text(encoding="utf-8"))


def _commands(text: str) -> list[str]:
    """Shell command lines of a block (continuations joined, comments dropped)."""
    joined = re.sub(r"\\\n\s*", " ", text)
    return [line.split(" #")[0].strip() for line in joined.splitlines()
            if line.strip() and not line.lstrip().startswith("#")]


def mfbridge_overrides(command: str) -> list[str] | None:
    """The Hydra overrides of an ``mfbridge ...`` solve command (``None`` for a subcommand or
    another program); a sweep's comma lists are cut to their first value."""
    words = shlex.split(command)
    if not words or Path(words[0]).name != "mfbridge":
        return None
    words = words[1:]
    if words[:1] and words[0] in ("check", "collect", "replay", "compare", "--help",
                                  "--version"):
        return None
    if words[:1] == ["fit"]:  # a fit's overrides are its positional arguments
        from mfbridge.runs.commands.fit import _parser

        return [w for w in _parser().parse_args(words[1:]).overrides if not w.startswith("hydra.")]
    if "-m" in words or "--multirun" in words:
        words = [w for w in words if w not in ("-m", "--multirun")]
        words = [w if w.startswith("hydra.") else w.split(",")[0] for w in words]
    return [w for w in words if not w.startswith("hydra.")]


def test_readme_has_blocks_of_each_kind():
    kinds = {b.language for b in BLOCKS}
    assert {"python", "bash", "text"} <= kinds
    assert any("output" in b.marks for b in BLOCKS)


def _python_blocks(slow: bool) -> list[Block]:
    return [b for b in BLOCKS if b.language == "python" and "skip" not in b.marks
            and ("slow" in b.marks) == slow]


def _run_python(blocks: list[Block], tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(tmp_path)
    namespace: dict[str, object] = {"__name__": "__readme__"}
    for block in blocks:
        try:
            exec(compile(block.text, f"README.md:{block.line}", "exec"), namespace)
        except Exception as exc:
            raise AssertionError(f"README.md python block at line {block.line} fails: "
                                 f"{type(exc).__name__}: {exc}") from exc


def test_python_blocks_run(tmp_path, monkeypatch):
    """Before: the lq_bridge block failed with NameError: x."""
    _run_python(_python_blocks(slow=False), tmp_path, monkeypatch)


@pytest.mark.slow
def test_python_blocks_run_all(tmp_path, monkeypatch):
    _run_python(_python_blocks(slow=False) + _python_blocks(slow=True), tmp_path, monkeypatch)


def test_command_lines_compose():
    """Every mfbridge solve command of the README composes (valid groups, options, keys)."""
    from mfbridge.runs.api import compose

    checked = 0
    for block in BLOCKS:
        if block.language not in ("bash", "text") or "skip" in block.marks:
            continue
        lines = _commands(block.text)
        if block.language == "text":
            lines = [line[2:] for line in lines if line.startswith("$ ")]
        for line in lines:
            for part in re.split(r"\s*&&\s*", line):
                overrides = mfbridge_overrides(part)
                if overrides is None:
                    continue
                compose(overrides)
                checked += 1
    assert checked >= 8


# ------------------------------------------------------------------ quoted output


def _pattern(quoted: str) -> tuple[re.Pattern[str], list[str | None]]:
    """A regex matching a printed line for a quoted one, and the quoted numbers it captures
    (``None`` where the number is not compared: seconds, paths, log time stamps)."""
    line = quoted.strip()
    line = re.sub(r"^\[\.\.\]", "", line)  # an elided log time stamp
    if "..." in line:  # an elision inside a line matches anything
        pieces = [_pattern(piece) for piece in line.split("...")]
        return (re.compile(".*?".join(p.pattern for p, _ in pieces)),
                [n for _, shown in pieces for n in shown])
    parts: list[str] = []
    shown: list[str | None] = []
    pos = 0
    token = re.compile(rf"(?P<path>\S*/\S*\d\S*)|(?P<sec>{NUMBER})(?= s\b)|(?P<num>{NUMBER})")
    for m in token.finditer(line):
        parts.append(r"\s+".join(re.escape(w) for w in re.split(r"\s+", line[pos:m.start()])))
        if m.group("path"):
            parts.append(r"\S+")
        elif m.group("sec"):
            parts.append(NUMBER)
        else:
            parts.append(f"({NUMBER})")
            shown.append(m.group("num"))
        pos = m.end()
    parts.append(r"\s+".join(re.escape(w) for w in re.split(r"\s+", line[pos:])))
    return re.compile("".join(parts)), shown


def _same(shown: str, printed: str) -> bool:
    """``printed`` rounds to ``shown`` at the digits shown."""
    if re.fullmatch(r"[-+]?\d+", shown):
        return int(float(printed)) == int(shown) and float(printed) == float(int(shown))
    mantissa = shown.lower().split("e")[0]
    decimals = len(mantissa.split(".")[1]) if "." in mantissa else 0
    value = float(printed)
    if "e" in shown.lower():
        return f"{value:.{decimals}e}" == f"{float(shown):.{decimals}e}"
    return f"{value:.{decimals}f}" == f"{float(shown):.{decimals}f}"


def check_quoted(quoted_lines: list[str], printed: str) -> list[str]:
    """Problems of the quoted lines against the printed text (empty when all match)."""
    printed_lines = printed.splitlines()
    problems = []
    for quoted in quoted_lines:
        if not quoted.strip() or quoted.strip() == "...":
            continue
        pattern, shown = _pattern(quoted)
        candidates = [m for line in printed_lines if (m := pattern.search(line))]
        if not candidates:
            problems.append(f"no printed line looks like: {quoted.strip()}")
            continue
        if not any(all(_same(s, m.group(i + 1)) for i, s in enumerate(shown) if s is not None)
                   for m in candidates):
            got = "; ".join(m.group(0) for m in candidates[:2])
            problems.append(f"numbers differ: README {quoted.strip()!r}, printed {got!r}")
    return problems


def test_number_check_can_fail():
    quoted = ["[..][mfbridge][INFO] - converged in 13 outer iterations: residual 2.24e-10",
              "[..][mfbridge][INFO] - cost J = 3.3883292  (kinetic 3.15935)"]
    printed = ("[2026-01-01 10:00:00,000][mfbridge][INFO] - converged in 12 outer iterations: "
               "residual 2.2449e-10\n[x][mfbridge][INFO] - cost J = 3.3894208  (kinetic 3.15935)")
    problems = check_quoted(quoted, printed)
    assert len(problems) == 2 and "13" in problems[0] and "3.3883292" in problems[1]
    good = printed.replace("12 outer", "13 outer").replace("3.3894208", "3.38832918")
    assert check_quoted(quoted, good) == []
    assert check_quoted(["Sinkhorn 2 it, 0.05 s"], "Sinkhorn 2 it, 1.23 s") == []


def _output_blocks(slow: bool) -> list[Block]:
    return [b for b in BLOCKS if b.language == "text" and "output" in b.marks
            and ("slow" in b.marks) == slow]


def _sessions(block: Block) -> list[tuple[str, list[str]]]:
    """(command, quoted output lines) for each ``$`` command of an output block."""
    out: list[tuple[str, list[str]]] = []
    for line in re.sub(r"\\\n\s*", " ", block.text).splitlines():
        if line.startswith("$ "):
            out.append((line[2:].strip(), []))
        elif out:
            out[-1][1].append(line)
    return out


def test_demo_output_is_current(tmp_path, monkeypatch, caplog):
    """The default scenario's quoted log (before: 13 iterations, J = 3.3883292 quoted while the
    demo printed 12 and 3.3894208). Solved in-process: the log lines are those of the CLI."""
    from mfbridge.runs.api import compose
    from mfbridge.runs.cli import run

    blocks = _output_blocks(slow=False)
    assert blocks, "README has no fast output block"
    for block in blocks:
        for command, quoted in _sessions(block):
            overrides = mfbridge_overrides(command)
            assert overrides is not None, f"README.md:{block.line}: {command} is not a solve"
            monkeypatch.chdir(tmp_path)
            caplog.clear()
            with caplog.at_level(logging.INFO, logger="mfbridge"):
                run(compose([*overrides, "figures=false"]), tmp_path / "run")
            printed = "\n".join(f"[..][mfbridge][INFO] - {r.getMessage()}"
                                for r in caplog.records)
            problems = check_quoted(quoted, printed)
            assert not problems, f"README.md:{block.line}: " + "\n".join(problems)


@pytest.fixture(scope="module")
def readme_tmp(tmp_path_factory):
    """One scratch folder for the slow blocks: later blocks use what earlier ones wrote (the
    collect block reads the sweep block's folder), as for a reader going top to bottom."""
    return tmp_path_factory.mktemp("readme")


@pytest.mark.slow
@pytest.mark.parametrize("block", _output_blocks(slow=True), ids=lambda b: f"line{b.line}")
def test_slow_output_blocks_are_current(block, readme_tmp):
    """Each slow output block, run through the console script from the repository root (the
    README's relative paths are from there); /tmp folders of the README go to a scratch
    folder shared by the blocks, in README order."""
    tmp_path = readme_tmp
    script = Path(sys.executable).with_name("mfbridge")
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1"}
    for command, quoted in _sessions(block):
        words = [w.replace("/tmp/", f"{tmp_path}/") for w in shlex.split(command)]
        assert Path(words[0]).name == "mfbridge"
        done = subprocess.run([str(script), *words[1:]], cwd=ROOT, env=env, text=True,
                              stdout=subprocess.PIPE, stderr=subprocess.STDOUT, timeout=1800,
                              check=False)
        quoted = [q.replace("/tmp/", f"{tmp_path}/") for q in quoted]
        problems = check_quoted(quoted, done.stdout)
        assert not problems, f"README.md:{block.line}: {command}\n" + "\n".join(problems)


@pytest.mark.slow
def test_fresh_clone_setup_as_written(tmp_path):
    """Item 6: the README's set-up block, run by bash in a fresh clone of this checkout's HEAD
    (before: after the set-up command `mfbridge` was "not found"). Every line runs as written
    but the test suite's, which runs here on one file (the whole suite is this suite)."""
    block = next(b for b in BLOCKS if b.language == "bash" and "python3 -m venv" in b.text)
    lines = _commands(block.text)
    assert any(line.startswith("source .venv/bin/activate") for line in lines)
    script = [line if line != "python -m pytest" else "python -m pytest -q tests/test_grid.py"
              for line in lines]
    clone = tmp_path / "clone"
    subprocess.run(["git", "clone", "-q", str(ROOT), str(clone)], check=True, timeout=300)
    env = {k: v for k, v in os.environ.items() if k not in ("VIRTUAL_ENV", "PYTHONPATH")}
    env["PATH"] = os.pathsep.join(p for p in env.get("PATH", "").split(os.pathsep)
                                  if ".venv" not in p)
    env["OPENBLAS_NUM_THREADS"] = "1"
    done = subprocess.run(["bash", "-e", "-c", "\n".join(script)], cwd=clone, env=env,
                          text=True, capture_output=True, timeout=3000, check=False)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    assert "cost J = " in done.stdout + done.stderr  # the demo ran
    assert list((clone / "runs").rglob("complete.json"))
    # the experiment scripts need no mfbridge on PATH: they call python -m mfbridge
    plain = subprocess.run([str(clone / ".venv/bin/python"), "-m", "mfbridge", "--version"],
                           cwd=clone, env=env, text=True, capture_output=True, check=False)
    assert plain.returncode == 0 and plain.stdout.startswith("mfbridge ")
