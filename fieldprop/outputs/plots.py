"""Stability pictures: each component's Richardson table against field strength.

One PNG per property (``<DIR>/<property>.png``), one panel per computed component.
In each panel the raw estimates D(k, 0) and every extrapolated column D(k, m) are
drawn against the field strength h_k of their first level; the chosen entry is
marked with its error bar, and the band value +- error is shaded (in the
legend); fields left out of the component (at or beyond a departure from the
zero-field state) are shaded red. The y-range follows the plateau around the
chosen value (_plateau_range), not the largest-field estimates; the legend sits
below the panels. A stable
derivative shows columns that flatten and meet; noise shows as scatter at small h,
contamination as drift at large h. Written with matplotlib's Agg backend (no
display needed).
"""

from __future__ import annotations

import math
from pathlib import Path

from fieldprop.outputs.files import replacing
from fieldprop.numerics.extrapolate import ComponentStatus
from fieldprop.numerics.plan import FieldPlan


#: The y-range shows the chosen value +- this many error bars, widened to the
#: entries that lie near the plateau (within PLATEAU_SPAN of it), so that
#: large-field points far off the value do not flatten the picture.
PLATEAU_BARS = 6.0
PLATEAU_SPAN = 0.05


def _plateau_range(est) -> tuple[float, float]:
    """y-limits set by the plateau: value +- PLATEAU_BARS error bars, widened to
    table entries within PLATEAU_SPAN (relative) of the value."""
    value, error = est.value_au, est.error_au
    half = max(PLATEAU_BARS * error, 1e-12 * max(abs(value), 1.0))
    near = [v for column in est.table for v in column
            if math.isfinite(v) and abs(v - value) <= PLATEAU_SPAN * max(abs(value), half)]
    low = min([value - half] + near)
    high = max([value + half] + near)
    pad = 0.05 * (high - low)
    return low - pad, high + pad


def write_plots(tensors, plan: FieldPlan, directory: Path) -> dict[str, list[str]]:
    """Write one PNG per tensor into ``directory``; returns {file name: component names}."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    steps = plan.steps_au()
    written: dict[str, list[str]] = {}
    for name, tensor in tensors.items():
        # Components zero by symmetry have no table: nothing to draw.
        comps = [c for c in tensor.components if c.plan.order > 0
                 and c.estimate.status is not ComponentStatus.SYMMETRY_ZERO]
        if not comps:
            continue
        ncols = min(5, len(comps))
        nrows = math.ceil(len(comps) / ncols)
        fig, axes = plt.subplots(nrows, ncols, figsize=(3.2 * ncols, 2.6 * nrows),
                                 squeeze=False, constrained_layout=True)
        for ax in axes.flat[len(comps):]:
            ax.set_visible(False)
        for ax, comp in zip(axes.flat, comps):
            est = comp.estimate
            for m, column in enumerate(est.table):
                hs = steps[:len(column)]
                ax.plot(hs, column, marker="o", ms=3, lw=1,
                        label="raw" if m == 0 else f"{m} step{'s' if m > 1 else ''}")
            kept = len(est.table[0]) if est.table else 0
            if kept < len(steps):  # fields left out: at or beyond a departure from the state
                ax.axvspan(steps[kept] / plan.ratio ** 0.5, steps[-1] * plan.ratio ** 0.5,
                           color="tab:red", alpha=0.12, lw=0, label="left out")
            k, m = est.chosen_entry
            if comp.stable and math.isfinite(est.value_au):
                ax.axhspan(est.value_au - est.error_au, est.value_au + est.error_au,
                           color="tab:green", alpha=0.2, lw=0, label="value +- error")
                ax.errorbar([steps[k]], [est.value_au], yerr=[est.error_au], fmt="s",
                            color="black", ms=5, capsize=3, label="chosen")
                status = est.status.value
                ax.set_ylim(*_plateau_range(est))
            else:
                status = "unstable"
            ax.set_xscale("log")
            ax.set_xticks(steps, [f"{h:g}" for h in steps])
            ax.minorticks_off()
            ax.set_title(f"{comp.plan.name} ({status})", fontsize=9)
            ax.set_xlabel("field strength h (au)", fontsize=8)
            ax.set_ylabel(f"{comp.plan.name} estimate (au)", fontsize=8)
            ax.tick_params(labelsize=7)
            ax.ticklabel_format(axis="y", useOffset=False, style="sci", scilimits=(-3, 4))
        # One legend for the figure, outside the panels: it covers no data.
        handles, labels = axes.flat[0].get_legend_handles_labels()
        for ax in axes.flat[1:len(comps)]:
            for h, lab in zip(*ax.get_legend_handles_labels()):
                if lab not in labels:
                    handles.append(h)
                    labels.append(lab)
        fig.legend(handles, labels, loc="outside lower center", ncols=min(len(labels), 6),
                   fontsize=7)
        fig.suptitle(f"{name}: Richardson table by field strength ({plan.route} route, au)",
                     fontsize=10)
        path = directory / f"{name}.png"
        try:
            with replacing(path, binary=True) as fh:
                fig.savefig(fh, format="png", dpi=90)
        finally:
            plt.close(fig)
        written[path.name] = [c.plan.name for c in comps]
    return written
