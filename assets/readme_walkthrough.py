"""Run the commands the READMEs show and put what they print into them.

    python assets/readme_walkthrough.py            # rewrite the outputs in README.md and the demo sets' READMEs
    python assets/readme_walkthrough.py --check    # exit 1 (and show the difference) when they differ

Each output block follows a marker line ``<!-- walkthrough:NAME -->``; the block is the fenced
block after it. The main README's walkthrough runs the commands of its steps; each demo set's
README shows the ladder that the default ``pixelfit fit`` prints for it. The commands run as
``python -m pixelfit ...`` in a scratch folder where ``demo_sets`` points at the repository's demo
sets, so the paths read as a newcomer's would. What changes from run to run (creation times) is
written as ``...``; long outputs are shortened where a block says so, with ``...`` where lines
were left out.
"""

from __future__ import annotations

import argparse
import difflib
import os
import re
import shlex
import subprocess
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"


def _drop(patterns: list[str]) -> Callable[[list[str]], list[str]]:
    """Leave out lines matching any pattern; each run of left-out lines becomes one '...'."""
    rx = [re.compile(p) for p in patterns]

    def shorten(lines: list[str]) -> list[str]:
        out: list[str] = []
        for line in lines:
            if any(r.search(line) for r in rx):
                if not out or out[-1] != "...":
                    out.append("...")
            else:
                out.append(line)
        return out

    return shorten


def _empty_grid_rows(lines: list[str]) -> list[str]:
    """Runs of two or more pixel-grid rows that read nothing become '  ... (N rows)'."""
    out: list[str] = []
    run: list[str] = []
    for line in lines + [""]:
        if re.fullmatch(r"  (\. )*\.", line):
            run.append(line)
            continue
        out.extend([f"  ... ({len(run)} rows)"] if len(run) > 1 else run)
        run = []
        out.append(line)
    return out[:-1]


def _spec_only(lines: list[str]) -> list[str]:
    """The command, then the spec table and the answer (the ladder table is the one shown before)."""
    start = next(i for i, line in enumerate(lines) if line.startswith("rung") and line.rstrip().endswith("verdict"))
    return [lines[0], "... (the same ladder table as above)"] + lines[start:]


def _cut_caution(lines: list[str]) -> list[str]:
    return [re.sub(r"^(caution: [^:]*:).*$", r"\1 ...", line) for line in lines]


@dataclass
class Block:
    name: str
    commands: list[str]
    shorten: list[Callable[[list[str]], list[str]]] = field(default_factory=list)
    doc: Path = README
    echo: bool = True  # print each command with a "$ " before its output


def _ladder_only(lines: list[str]) -> list[str]:
    """The ladder table and the recommendation, without the lines around them."""
    start = next(i for i, line in enumerate(lines) if line.startswith("rung "))
    end = next(i for i, line in enumerate(lines) if line.startswith("recommended:"))
    return lines[start:end + 1]


BLOCKS = [
    Block("scan", ["pixelfit scan bottle-caps"]),
    Block("fit", ["pixelfit fit bottle-caps --out runs/bottle-caps --families constant,lut,tree,memorize"],
          [_drop([r"^tree-[23] "])]),
    Block("spec", ["pixelfit fit bottle-caps --out runs/bottle-caps-spec --families constant,lut,tree,memorize "
                   '--spec "precision>=0.75,recall>=0.70"'], [_spec_only]),
    Block("show", ["pixelfit show runs/bottle-caps/rules/lut-3.json"], [_empty_grid_rows, _cut_caution]),
    Block("apply", ["pixelfit apply runs/bottle-caps/rules/tree-5.json demo_sets/bottle-caps "
                    "--split runs/bottle-caps/split.csv --subset test --csv runs/held-out.csv",
                    "head -3 runs/held-out.csv"]),
    Block("export", ["pixelfit export runs/bottle-caps/rules/tree-5.json --c firmware/cap_check.h "
                     "--vectors-from demo_sets/bottle-caps"]),
] + [Block("ladder", [f"pixelfit fit {name} --out runs/{name}"], [_ladder_only], ROOT / "demo_sets" / name / "README.md",
           echo=False) for name in ("bottle-caps", "solder-bridges")]


def _normalise(text: str) -> str:
    text = re.sub(r"created \d{4}-\d\d-\d\dT[\d:+.-]+", "created ...", text)
    return text


def run_command(command: str, cwd: Path) -> list[str]:
    argv = shlex.split(command)
    if argv[0] == "head":
        n = int(argv[1].lstrip("-"))
        return (cwd / argv[2]).read_text(encoding="utf-8").splitlines()[:n]
    env = dict(os.environ, PYTHONPATH=str(ROOT), COLUMNS="200")
    res = subprocess.run([sys.executable, "-m", "pixelfit", *argv[1:]], cwd=cwd, env=env, capture_output=True,
                         text=True, timeout=1800)
    if res.returncode != 0:
        raise SystemExit(f"`{command}` exited {res.returncode}:\n{res.stderr}")
    # The progress bar goes to stderr (a line per rung when not a terminal): not part of the output.
    stderr = [ln for ln in res.stderr.splitlines() if not ln.startswith("[")]
    return _normalise(res.stdout).splitlines() + _normalise("\n".join(stderr)).splitlines()


def outputs() -> dict[Path, dict[str, str]]:
    """Per document, the text of each of its blocks."""
    with tempfile.TemporaryDirectory() as tmp:
        cwd = Path(tmp)
        (cwd / "demo_sets").symlink_to(ROOT / "demo_sets", target_is_directory=True)
        result: dict[Path, dict[str, str]] = {}
        for block in BLOCKS:
            lines: list[str] = []
            for command in block.commands:
                if block.echo:
                    lines.append(f"$ {command}")
                lines.extend(run_command(command, cwd))
            for shorten in block.shorten:
                lines = shorten(lines)
            result.setdefault(block.doc, {})[block.name] = "\n".join(lines)
        return result


def splice(text: str, blocks: dict[str, str], doc: Path = README) -> str:
    for name, body in blocks.items():
        rx = re.compile(rf"(<!-- walkthrough:{re.escape(name)} -->\n+```(?:text)?\n)(.*?)(\n```)", re.S)
        if not rx.search(text):
            raise SystemExit(f"{doc.relative_to(ROOT)} has no block marked <!-- walkthrough:{name} -->")
        text = rx.sub(lambda m, t=body: m.group(1) + t + m.group(3), text, count=1)
    return text


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--check", action="store_true", help="compare instead of writing")
    args = ap.parse_args(argv)
    differ = False
    for doc, blocks in outputs().items():
        name = str(doc.relative_to(ROOT))
        old = doc.read_text(encoding="utf-8")
        new = splice(old, blocks, doc)
        if new == old:
            print(f"{name} matches what the commands print")
        elif args.check:
            differ = True
            sys.stdout.writelines(difflib.unified_diff(old.splitlines(True), new.splitlines(True), name,
                                                       f"{name} (as the commands print it now)"))
        else:
            tmp = doc.with_suffix(".md.tmp")
            tmp.write_text(new, encoding="utf-8")
            os.replace(tmp, doc)
            print(f"{name} updated")
    return 1 if differ else 0


if __name__ == "__main__":
    sys.exit(main())
