"""How many loop nests of the samples and test kernels looptile can analyse (and so rewrite).

    .venv/bin/python bench/rewrite_coverage.py                # this checkout
    .venv/bin/python bench/rewrite_coverage.py --rev 402cf5e  # an older commit, for before/after

Runs ``looptile analyze --json`` on every .c file under samples/ and tests/ (the fixtures'
inputs, the hostile corpus, the kernels of the feature tests; generated outputs excluded) and
counts the nests, the analysable ones and those with a band of at least two permutable loops.
With --rev, the older looptile (a git worktree of that commit, run from its source tree)
analyses the same files of this checkout, so both numbers are about the same inputs.
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def files() -> list[Path]:
    out = sorted((REPO / "samples").glob("*.c"))
    for p in sorted((REPO / "tests").rglob("*.c")):
        if p.name.startswith("expected") or "generated" in p.parts:
            continue
        out.append(p)
    return out


def count(pythonpath: Path, paths: list[Path]) -> dict[str, dict[str, int]]:
    groups: dict[str, dict[str, int]] = {}
    env = dict(os.environ, PYTHONPATH=str(pythonpath))
    for p in paths:
        group = "samples" if p.parent.name == "samples" else "tests/" + p.relative_to(REPO / "tests").parts[0]
        g = groups.setdefault(group, {"files": 0, "nests": 0, "analysable": 0, "bands>=2": 0})
        g["files"] += 1
        r = subprocess.run([sys.executable, "-m", "looptile.cli", "analyze", "--json", str(p)], capture_output=True,
                           text=True, env=env, cwd=pythonpath, timeout=600)
        try:
            doc = json.loads(r.stdout)
        except json.JSONDecodeError:
            continue  # a file looptile cannot load at all (the hostile corpus has some)
        for report in doc.values():
            for n in report.get("nests", []):
                g["nests"] += 1
                if n.get("analysable"):
                    g["analysable"] += 1
                    if any(len(b) >= 2 for b in n.get("permutable_bands", [])):
                        g["bands>=2"] += 1
    return groups


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--rev", help="also count with looptile at this git revision")
    args = ap.parse_args()
    paths = files()
    results = {"this checkout": count(REPO, paths)}
    if args.rev:
        with tempfile.TemporaryDirectory(prefix="looptile-coverage-") as tmp:
            wt = Path(tmp, "wt")
            subprocess.run(["git", "-C", str(REPO), "worktree", "add", "--detach", str(wt), args.rev], check=True,
                           capture_output=True)
            try:
                results[args.rev] = count(wt, paths)
            finally:
                subprocess.run(["git", "-C", str(REPO), "worktree", "remove", "--force", str(wt)], capture_output=True)
    for label, groups in results.items():
        total = {k: sum(g[k] for g in groups.values()) for k in ("files", "nests", "analysable", "bands>=2")}
        print(f"{label}: {total['analysable']} of {total['nests']} nests analysable "
              f"({total['bands>=2']} with a permutable band of 2+ loops) in {total['files']} files")
        for name, g in sorted(groups.items()):
            print(f"  {name:24} {g['analysable']:4} / {g['nests']:4} nests  ({g['files']} files)")


if __name__ == "__main__":
    main()
