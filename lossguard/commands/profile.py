"""``lossguard profile TARGET --kind …``: error in ULPs against logit magnitude, per dtype.

Prints the safe logit range of every dtype (largest |z| with finite, accurate results) and, with
``--png PATH``, draws the curves (matplotlib, an optional dependency).
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

import numpy as np

from .._paths import check_report_paths, writing
from ..errors import LossguardError
from ..profile import Profile, profile
from ..tolerance import DTYPES
from ._target import add_target_options, spec_from_args

__all__ = ["add_parser", "main", "render_profile", "write_png"]

HELP = "measure value and gradient error (ULPs) against logit magnitude in every dtype"

#: Curve colours per dtype (colour-blind safe: the Okabe–Ito palette).
COLOURS = {"float16": "#D55E00", "bfloat16": "#E69F00", "float32": "#0072B2", "float64": "#009E73"}
FLOOR, CEIL = 0.1, 1e9  # y range of the plot in ULPs; 0 is drawn at the floor, inf above the ceiling


def add_parser(sub: argparse._SubParsersAction) -> argparse.ArgumentParser:
    p = sub.add_parser("profile", help=HELP, description=HELP)
    p.add_argument("target", metavar="TARGET", help="path/to/file.py:function or package.module:function")
    add_target_options(p)
    p.add_argument("--png", metavar="PATH", help="write the plot as a PNG (needs matplotlib)")
    p.add_argument("--dtype", action="append", choices=DTYPES, metavar="NAME",
                   help="profile just this dtype (repeatable; default: all four)")
    return p


def main(args: argparse.Namespace) -> int:
    spec = spec_from_args(args, args.target)
    check_report_paths(png=args.png)
    if args.png:
        _matplotlib()  # fail before the work, not after it
    prof = profile(spec, seed=args.seed, dtypes=tuple(args.dtype or DTYPES), target=args.target, effort=args.effort,
                   call_timeout=args.call_timeout, time_budget=args.time_budget)
    sys.stdout.write(render_profile(prof))
    if args.png:
        with writing("png", args.png):
            write_png(prof, args.png)
        sys.stdout.write(f"  wrote {args.png}\n")
    return 0


def _fmt(x: float) -> str:
    return "-" if not np.isfinite(x) else f"{x:.2g}"


def render_profile(prof: Profile) -> str:
    """The safe logit range per dtype, as plain text."""
    lines = [
        f"precision profile of {prof.target}  (kind={prof.kind}, shape {prof.shape}, seed {prof.seed})",
        f"  oracle: {prof.oracle}",
        "  errors in ULPs of each dtype at the scale |v*| + max|z| (value), ‖g*‖∞ + G (gradient)",
        "",
        f"  {'dtype':<10}{'safe |z| up to':<16}{'worst error inside (value / gradient)':<40}the range ends because",
    ]
    for r in prof.rows:
        safe = "none" if r.safe_limit is None else f"{r.safe_limit:.3g}"
        wv, wg = r.worst_inside()
        worst = "finiteness only (oracle)" if r.judged == "finiteness" else (
            f"{_fmt(wv)} / {_fmt(wg) if prof.has_gradient else 'n/a'} ULPs")
        lines.append(f"  {r.dtype:<10}{safe:<16}{worst:<40}{r.end}")
    lines.append("  a safe range is measured on the inputs tried: evidence, not proof")
    return "\n".join(lines) + "\n"


def _matplotlib() -> Any:
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise LossguardError("--png: expected matplotlib to draw the plot; try pip install matplotlib") from None
    return Figure


#: The x axis in three stretches of log10|z|: everyday logits (−3 … 6) at full width, the rest of
#: the float32/bfloat16 range (6 … 38) compressed 4×, float64's tail (38 … 308) compressed 25×.
_BREAKS = ((-3.0, 6.0, 1.0), (6.0, 38.0, 0.25), (38.0, 309.0, 1.0 / 25.0))


def _xmap(mag: np.ndarray | float) -> np.ndarray:
    """Plot coordinate of a magnitude: piecewise-linear in log10|z| (see :data:`_BREAKS`)."""
    e = np.log10(np.asarray(mag, dtype=np.float64))
    out, start = np.zeros_like(e), 0.0
    for lo, hi, w in _BREAKS:
        out += np.clip(e - lo, 0.0, hi - lo) * w
    return out + np.minimum(e - _BREAKS[0][0], 0.0) + start


def _shown(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(finite errors clipped into the plot, mask of non-finite results)."""
    bad = np.isinf(a)
    return np.clip(np.where(np.isfinite(a), a, np.nan), FLOOR, CEIL), bad


def write_png(prof: Profile, path: str) -> None:
    """Two panels (value, gradient): error in ULPs against |z|, one curve per dtype.

    Crosses at the top mark non-finite results where the true value fits the dtype; the dotted
    curves are the error model's allowance; a vertical line ends each dtype's safe range.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    figure = _matplotlib()
    fig = figure(figsize=(11, 4.6), dpi=110)
    FigureCanvasAgg(fig)  # an explicit canvas: no global backend is chosen or changed
    panels = [("value", "value_ulps", "value_allowance_ulps")]
    if prof.has_gradient:
        panels.append(("gradient", "grad_ulps", "grad_allowance_ulps"))
    axes = fig.subplots(1, len(panels), sharey=True, squeeze=False)[0]
    for ax, (title, key, allow_key) in zip(axes, panels):
        for r in prof.rows:
            col = COLOURS.get(r.dtype, "black")
            x = _xmap(r.magnitudes)  # exponents, stretched: a log axis to 1e308 overflows its margins
            y, bad = _shown(getattr(r, key))
            ax.plot(x, y, "-", color=col, lw=1.6, marker=".", ms=3)
            if r.judged == "accuracy":
                allow = getattr(r, allow_key)
                ax.plot(x, np.where(allow < CEIL, np.maximum(allow, FLOOR), np.nan), ":", color=col, lw=1)
            ax.plot(x[bad], np.full(int(bad.sum()), CEIL * 3), "x", color=col, ms=6, mew=1.5)
            if r.safe_limit is not None:
                ax.axvline(float(_xmap(r.safe_limit)), color=col, ls="--", lw=1, alpha=0.8)
        ticks = [-3, 0, 3, 6, 16, 38, 150, 308]
        ax.set_xticks(_xmap(10.0 ** np.array(ticks, dtype=np.float64)), [f"$10^{{{t}}}$" for t in ticks])
        for b in (6.0, 38.0):  # where the stretch changes
            ax.axvline(float(_xmap(10.0**b)), color="0.75", lw=0.8, ls="-", zorder=0)
        ax.set_xlim(float(_xmap(10.0**-3.3)), float(_xmap(1e308)) + 0.3)
        ax.set_yscale("log")
        ax.set_ylim(FLOOR / 2, CEIL * 10)
        ax.set_xlabel("logit magnitude |z|  (axis compressed beyond 1e6 and 1e38)")
        ax.set_title(f"{title} error", fontsize=11)
        ax.grid(True, which="major", alpha=0.3)
        ax.axhspan(CEIL * 1.5, CEIL * 10, color="0.92", zorder=0)
        ax.text(0.0, CEIL * 3, "non-finite", fontsize=8, va="center", color="0.3")
    axes[0].set_ylabel("error in ULPs (at the error model's scale)")
    handles = [axes[0].plot([], [], "-", color=COLOURS.get(r.dtype, "black"))[0] for r in prof.rows]
    labels = [f"{r.dtype}: safe to |z| ≤ {'none' if r.safe_limit is None else f'{r.safe_limit:.2g}'}"
              for r in prof.rows]
    handles += [axes[0].plot([], [], ":", color="0.4")[0], axes[0].plot([], [], "--", color="0.4")[0]]
    labels += ["allowance (error model)", "end of the safe range"]
    fig.legend(handles, labels, loc="lower center", ncol=3, fontsize=8, frameon=False)
    fig.suptitle(f"Precision profile of {prof.target}\noracle: {prof.oracle}", fontsize=10)
    fig.subplots_adjust(left=0.07, right=0.98, top=0.83, bottom=0.27, wspace=0.06)
    fig.savefig(path)
