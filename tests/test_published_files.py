"""The files a run publishes: tables that survive hostile column names, readable modes.

estimates.tex must compile whatever the columns are called (every LaTeX special
character escaped, in labels, captions and notes), estimates.md must stay one
table (``|`` and line breaks inside a cell escaped), and every published file must
be readable by the people the user's umask lets read it, and writable by no one.
"""

from __future__ import annotations

import json
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from _support import (
    HOSTILE_HEADER,
    hostile_analysis,
    hostile_rows,
    panel_settings,
    write_hostile_config,
)
from panelpipe.estimate import estimate_all, make_design
from panelpipe.report import latex_text, markdown_cell, paper_tables

# Column names a delivery may well carry; each breaks an unescaped table.
HOSTILE_NAMES = {
    "x1": "jobs_%_share",
    "x2": "a&b",
    "z": "x_1 {} \\ $5 #2 ^ ~ | new\nline\tand\x07bell",
}

# The ten characters LaTeX gives a special meaning, with the text-mode commands
# that print them (the LaTeX2e manual, section "Special characters"; common practice).
LATEX_SPECIALS = {
    "\\": r"\textbackslash{}",
    "{": r"\{",
    "}": r"\}",
    "$": r"\$",
    "&": r"\&",
    "#": r"\#",
    "^": r"\textasciicircum{}",
    "_": r"\_",
    "%": r"\%",
    "~": r"\textasciitilde{}",
}


@pytest.mark.parametrize("char", list(LATEX_SPECIALS), ids=lambda c: f"U+{ord(c):04X}")
def test_every_latex_special_character_is_escaped(char: str) -> None:
    assert latex_text(f"a{char}b") == f"a{LATEX_SPECIALS[char]}b"


def test_latex_text_escapes_in_one_pass_and_shows_control_characters() -> None:
    # One pass: the braces of \textbackslash{} are not escaped again.
    assert latex_text("\\{}") == r"\textbackslash{}\{\}"
    assert latex_text("jobs_%_share") == r"jobs\_\%\_share"
    # Line breaks, tabs and other control characters become visible code points.
    assert latex_text("a\nb\tc\x07") == r"a b c\textless{}U+0007\textgreater{}"


def test_markdown_cells_escape_pipes_backslashes_and_line_breaks() -> None:
    # GitHub Flavored Markdown spec, "Tables (extension)": a pipe inside a cell is \|.
    assert markdown_cell("a|b") == r"a\|b"
    assert markdown_cell("a\\") == "a\\\\"  # else it would escape the cell's closing pipe
    assert markdown_cell("new\nline\r\tx\x07") == "new line  x<U+0007>"


@pytest.fixture(scope="module")
def hostile_tables(make_panel) -> tuple[str, str]:  # type: ignore[no-untyped-def]
    panel = make_panel().rename(columns=HOSTILE_NAMES)
    settings = panel_settings(
        regressors=tuple(HOSTILE_NAMES.values()),
        estimators=("pooled_ols", "fixed_effects", "random_effects"),  # labels with an en dash
        period_effects=False,
    )
    design, _ = make_design(panel, settings)
    models, _ = estimate_all(design)
    return paper_tables(models, settings.regressors, settings.level)


def _unescaped(text: str) -> list[str]:
    """Characters of ``text`` that LaTeX would read as specials, outside commands we wrote."""
    bare = text
    for escaped in LATEX_SPECIALS.values():
        bare = bare.replace(escaped, "")
    for command in (r"\textless{}", r"\textgreater{}"):
        bare = bare.replace(command, "")
    return [c for c in "#$%^_~" if c in bare] + [c for c in "\x07\t" if c in bare]


def test_the_latex_table_escapes_labels_and_caption(hostile_tables: tuple[str, str]) -> None:
    _, latex = hostile_tables
    body = latex.split(r"\begin{tabular}")[1].split(r"\end{tabular}")[0]
    caption = latex.split(r"\caption{")[1].split("}\n")[0]
    assert r"95\%" in caption
    for name in HOSTILE_NAMES.values():
        assert latex_text(name) in body
    assert _unescaped(body) == [] and _unescaped(caption) == []
    # The rows end in \\ and the cells are separated by & only where we put them.
    rows = [r for r in body.split("\n") if r.endswith(r"\\")]
    assert len({r.replace(r"\&", "").count("&") for r in rows}) == 1


def test_the_markdown_table_stays_one_table(hostile_tables: tuple[str, str]) -> None:
    markdown, _ = hostile_tables
    lines = markdown.split("\n\n")[0].split("\n")
    cells = [len(line.replace(r"\|", "").split("|")) for line in lines]
    assert len(set(cells)) == 1, lines  # every row has as many cells as the header
    assert len(lines) == 2 + 3 + 2  # header, rule, three terms, intercept, rows used
    assert "95% intervals" in markdown


@pytest.mark.skipif(shutil.which("pdflatex") is None, reason="pdflatex is not installed")
def test_estimates_tex_compiles_with_hostile_names(
    hostile_tables: tuple[str, str], tmp_path: Path
) -> None:
    _, latex = hostile_tables
    (tmp_path / "estimates.tex").write_text(latex, encoding="utf-8")
    (tmp_path / "paper.tex").write_text(
        "\\documentclass{article}\n\\begin{document}\n\\input{estimates.tex}\n\\end{document}\n",
        encoding="utf-8",
    )
    done = subprocess.run(
        ["pdflatex", "-halt-on-error", "-interaction=nonstopmode", "paper.tex"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        errors="replace",
        timeout=300,
    )
    assert done.returncode == 0, done.stdout[-3000:]
    assert (tmp_path / "paper.pdf").stat().st_size > 0


# ---------------------------------------------------------------- file modes

_UNDER_UMASK = (
    "import os, sys\n"
    "os.umask(int(sys.argv[1], 8))\n"
    "from panelpipe.cli import main\n"
    "sys.exit(main(sys.argv[2:]))\n"
)
PUBLISHED = (
    "report.html",
    "results.json",
    "estimates.csv",
    "manifest.json",
    "estimates.md",
    "estimates.tex",
)


@pytest.mark.parametrize(("umask", "readable"), [(0o022, 0o444), (0o077, 0o400)], ids=oct)
def test_atomic_write_text_honours_the_umask(umask: int, readable: int, tmp_path: Path) -> None:
    code = (
        "import os, sys; from pathlib import Path; os.umask(int(sys.argv[1], 8))\n"
        "from panelpipe.runs import atomic_write_text\n"
        "atomic_write_text(Path(sys.argv[2]), 'text')\n"
    )
    target = tmp_path / "f.txt"
    subprocess.run([sys.executable, "-c", code, oct(umask), str(target)], check=True)
    assert stat.S_IMODE(target.stat().st_mode) == 0o666 & ~umask
    assert [p.name for p in tmp_path.iterdir()] == ["f.txt"]  # no temporary file left


@pytest.mark.slow
@pytest.mark.parametrize(("umask", "readable"), [(0o022, 0o444), (0o077, 0o400)], ids=oct)
def test_published_files_are_readable_as_the_umask_allows_and_never_writable(
    umask: int, readable: int, tmp_path: Path
) -> None:
    (tmp_path / "a.csv").write_text(HOSTILE_HEADER + hostile_rows(), encoding="utf-8")
    config = write_hostile_config(tmp_path, hostile_analysis())
    done = subprocess.run(
        [sys.executable, "-c", _UNDER_UMASK, oct(umask), "run", "--config", str(config)],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    run_id = json.loads(done.stdout.strip().splitlines()[-1])["run_id"]
    folder = tmp_path / "out" / "t" / run_id
    modes = {leaf: oct(stat.S_IMODE((folder / leaf).stat().st_mode)) for leaf in PUBLISHED}
    assert modes == dict.fromkeys(PUBLISHED, oct(readable))
    latest = tmp_path / "out" / "t" / "latest"
    assert stat.S_IMODE(latest.stat().st_mode) == 0o666 & ~umask
