"""What tune prints: the table of variants, the best choice and its command, the JSON
document, and the optional plot (matplotlib, the ``plot`` extra)."""
from __future__ import annotations

from .errors import UsageError
from .tune import TuneResult, Variant


def _rate(r: TuneResult, v: Variant) -> str:
    x = r.work.rate(v.seconds) if v.seconds else None
    return f"{x:.2f}" if x is not None else "-"


def _speedup(r: TuneResult, v: Variant) -> float | None:
    return r.original.seconds / v.seconds if v.seconds else None


def table(r: TuneResult) -> list[str]:
    unit = r.work.unit or "rate"
    rows = [("variant", "from", "time (s)", unit, "speedup", "runs", "note")]
    ordered = [r.original] + sorted((v for v in r.variants if v is not r.original),
                                    key=lambda v: (v.seconds is None, v.seconds or 0))
    for v in ordered:
        sp = _speedup(r, v)
        note = v.note
        if v.status not in ("timed",):
            note = v.status + (f": {v.note}" if v.note else "")
        elif v.result_hash and r.original.result_hash and v.result_hash != r.original.result_hash:
            note = (note + "; " if note else "") + "result bits differ from the original's under these CFLAGS"
        rows.append((v.config.label(), v.config.origin, f"{v.seconds:.6f}" if v.seconds else "-", _rate(r, v),
                     f"{sp:.2f}x" if sp else "-", str(len(v.times)) if v.times else "-", note))
    widths = [max(len(row[k]) for row in rows) for k in range(6)]
    return ["  ".join(c.ljust(w) for c, w in zip(row[:6], widths)) + ("  " + row[6] if row[6] else "")
            for row in rows]


def summary(r: TuneResult) -> list[str]:
    lines = [f"{r.path}: nest {r.selector} (function {r.function}), band {', '.join(r.band)}; "
             f"CFLAGS {' '.join(r.cflags)}; {len(r.variants)} variants in {r.elapsed:.1f} s of a "
             f"{r.budget:.0f} s budget" + (f", {r.skipped} skipped when the budget was spent" if r.skipped else ""),
             f"rate: {r.work.how}"]
    lines += [f"note: {n}" for n in r.notes]
    b, o = r.best, r.original
    if b is o:
        fastest = min((v for v in r.variants if v.seconds and v is not o), key=lambda v: v.seconds, default=None)
        what = (f"the fastest, {fastest.config.label()}, took {fastest.seconds:.6f} s against {o.seconds:.6f} s "
                f"({o.seconds / fastest.seconds:.2f}x)") if fastest else "no variant could be timed"
        margin = max(r.min_gain, o.spread)
        why = f" (the original's own times moved by {o.spread:.0%} during the run)" if o.spread > r.min_gain else ""
        lines.append(f"no variant beats the original by more than {margin:.0%}{why} here: {what}; keep the original")
        return lines
    lines.append(f"best: {b.config.label()}: {b.seconds:.6f} s"
                 + (f", {_rate(r, b)} {r.work.unit}" if r.work.unit else "")
                 + f", {o.seconds / b.seconds:.2f}x the original ({o.seconds:.6f} s)")
    if r.verified is not None:
        lines.append(f"verified: {r.verified.verdict.removeprefix('verdict: ')}")
    lines.append(f"apply it with: {b.command}")
    if b.config.extra_cflags:
        lines.append(f"and build it with: {' '.join(r.cflags + b.config.extra_cflags)} (the variant was timed so)")
    return lines


def _variant_json(r: TuneResult, v: Variant) -> dict:
    sp = _speedup(r, v)
    rate = r.work.rate(v.seconds) if v.seconds else None
    return {"label": v.config.label(), "origin": v.config.origin, "sizes": v.config.sizes,
            "levels": [dict(lv) for lv in v.config.levels], "jam": dict(v.config.jam),
            "scalarize": v.config.scalarize, "cflags": list(r.cflags + v.config.extra_cflags),
            "status": v.status, "seconds": v.seconds, "times": v.times, "confirmed_times": v.confirmed,
            "rate": rate, "unit": r.work.unit or None, "speedup": sp,
            "same_result": (v.result_hash == r.original.result_hash) if v.result_hash else None,
            "command": v.command, "note": v.note or None}


def as_json(r: TuneResult) -> dict:
    best = _variant_json(r, r.best)
    best["verified"] = r.verified is not None and r.verified.status == 0
    best["verify"] = list(r.verified.lines) if r.verified is not None else None
    if r.best is r.original:
        best["speedup"] = 1.0
    return {"file": r.path, "nest": r.selector, "function": r.function, "band": list(r.band),
            "cflags": list(r.cflags), "original_seconds": r.original.seconds, "best": best,
            "original_won": r.best is r.original, "metric": r.work.unit or "seconds", "metric_basis": r.work.how,
            "flops": r.work.flops, "bytes": r.work.bytes, "budget_seconds": r.budget,
            "elapsed_seconds": round(r.elapsed, 3), "verify_seconds": round(r.verify_seconds, 3),
            "skipped": r.skipped, "notes": r.notes,
            "variants": [_variant_json(r, v) for v in r.variants]}


def plot(r: TuneResult, path: str) -> str:
    """Write a PNG: a heat map of the innermost sizes when two loops are tiled (the best time of
    each pair of sizes, any jam), else a bar chart of the speedups. Returns what was drawn."""
    try:
        import matplotlib
        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise UsageError("--plot needs matplotlib: pip install 'looptile[plot]' (or pip install matplotlib)") \
            from None
    timed = [v for v in r.variants if v.seconds and v.config.levels]
    fig, ax = plt.subplots(figsize=(8, 5.5))
    if len(r.band) == 2 and timed:
        a, b = r.band
        xs = sorted({v.config.sizes.get(a) for v in timed if a in v.config.sizes})
        ys = sorted({v.config.sizes.get(b) for v in timed if b in v.config.sizes})
        grid = [[float("nan")] * len(xs) for _ in ys]
        for v in timed:
            if a in v.config.sizes and b in v.config.sizes:
                i, j = ys.index(v.config.sizes[b]), xs.index(v.config.sizes[a])
                if not grid[i][j] == grid[i][j] or v.seconds < grid[i][j]:
                    grid[i][j] = v.seconds
        im = ax.imshow(grid, origin="lower", cmap="viridis_r", aspect="auto")
        ax.set_xticks(range(len(xs)), [str(x) for x in xs])
        ax.set_yticks(range(len(ys)), [str(y) for y in ys])
        ax.set_xlabel(f"tile size of {a}")
        ax.set_ylabel(f"tile size of {b}")
        fig.colorbar(im, ax=ax, label=f"seconds per call (original {r.original.seconds:.4g} s)")
        ax.set_title(f"{r.function}: best time per pair of tile sizes")
        kind = "heat map"
    else:
        shown = sorted(timed, key=lambda v: v.seconds)[:30]
        labels = ["original"] + [v.config.label() for v in shown]
        speed = [1.0] + [r.original.seconds / v.seconds for v in shown]
        ax.barh(range(len(labels)), speed, color=["grey"] + ["tab:blue"] * len(shown))
        ax.set_yticks(range(len(labels)), labels, fontsize=7)
        ax.invert_yaxis()
        ax.axvline(1.0, color="black", linewidth=0.8)
        ax.set_xlabel("speedup over the original")
        ax.set_title(f"{r.function}: variants timed")
        kind = "bar chart"
    fig.tight_layout()
    fig.savefig(path, format="png", dpi=100)
    plt.close(fig)
    return kind
