"""Pictures of a classifier's held-out evaluation: threshold curves, confusion matrix, calibration,
permutation importance, the classifier against the published criteria, and the figures at the sky's
class mix (completeness and purity at both mixes, reliability after the prior adjustment).

Figures are drawn on the Agg canvas (no display, no global pyplot state) and saved without the
software tag, so the same evaluation gives the same bytes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from selector.jobs.train.evaluation import COMPLETENESS_TARGET, TrainingEvaluation
from selector.store.io import atomic_path
from selector.store.layout import SKY_PLOT_FILES, TRAINING_PLOT_FILES

__all__ = ["write_training_plots"]


def _save_png(fig, path: Path) -> Path:
    """Lay the figure out, write it to ``path`` and return ``path``."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig.tight_layout()
    FigureCanvasAgg(fig)
    with atomic_path(path) as tmp:
        fig.savefig(tmp, format="png", dpi=110, metadata={"Software": None})
    return path


def _class_panels(classes):
    """A figure with one panel per class, side by side, and its axes in class order."""
    from matplotlib.figure import Figure

    k = len(classes)
    fig = Figure(figsize=(3.7 * k, 3.6))
    return fig, [fig.add_subplot(1, k, i + 1) for i in range(k)]


def _nan(values) -> np.ndarray:
    """None (an undefined ratio) as NaN, which the plots leave out."""
    return np.array([np.nan if v is None else v for v in values], float)


def write_training_plots(evaluation: TrainingEvaluation, out_dir: Path) -> list[Path]:
    """Draw the evaluation as PNG files in ``out_dir`` (named by :data:`~selector.store.layout.TRAINING_PLOT_FILES`).

    Parameters
    ----------
    evaluation : TrainingEvaluation
        The held-out figures of a training.
    out_dir : pathlib.Path
        The classifier's output folder.

    Returns
    -------
    list of pathlib.Path
        The files written, in drawing order.
    """
    from matplotlib.figure import Figure

    out_dir = Path(out_dir)
    paths = []
    e = evaluation
    classes = e.classes
    thr = np.asarray(e.thresholds)

    fig, axes = _class_panels(classes)
    for name, ax in zip(classes, axes):
        ax.plot(thr, _nan(e.threshold_curves[name].completeness), label="completeness")
        ax.plot(thr, _nan(e.threshold_curves[name].purity), label="purity")
        ax.axvline(e.threshold, color="0.6", lw=0.8, ls="--")
        ax.set(title=name, xlabel=f"threshold on P({name})", ylim=(0, 1.02))
    axes[0].legend(loc="lower left")
    fig.suptitle("held-out completeness and purity at the labelled class mix")
    paths.append(_save_png(fig, out_dir / TRAINING_PLOT_FILES[0]))

    fig = Figure(figsize=(4.8, 4.2))
    ax = fig.add_subplot(1, 1, 1)
    counts = np.asarray(e.confusion_counts, float)
    frac = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1)
    ax.imshow(frac, vmin=0, vmax=1, cmap="Blues")
    for r in range(len(classes)):
        for c in range(len(classes)):
            ax.text(c, r, f"{int(counts[r, c]):,d}\n{frac[r, c]:.1%}", ha="center", va="center",
                    color="white" if frac[r, c] > 0.5 else "black", fontsize=8)
    ax.set(xticks=range(len(classes)), yticks=range(len(classes)), xticklabels=classes, yticklabels=classes,
           xlabel="most probable class", ylabel="true class", title="held-out confusion matrix")
    paths.append(_save_png(fig, out_dir / TRAINING_PLOT_FILES[1]))

    fig, axes = _class_panels(classes)
    for name, ax in zip(classes, axes):
        ax.plot([0, 1], [0, 1], color="0.7", lw=0.8)
        curves = e.calibration_curves[name]
        for kind, cc, style in (("raw", curves.raw, "o--"), ("calibrated", curves.calibrated, "s-")):
            ax.plot(_nan(cc.mean_predicted), _nan(cc.observed_fraction), style, ms=3, label=kind)
        ax.set(title=name, xlabel=f"predicted P({name})", ylabel="observed fraction", xlim=(0, 1), ylim=(0, 1))
    axes[0].legend(loc="upper left")
    fig.suptitle("calibration on held-out folds, at the labelled class mix")
    paths.append(_save_png(fig, out_dir / TRAINING_PLOT_FILES[2]))

    pi = e.importance
    fig = Figure(figsize=(6.4, 0.25 * len(pi.features) + 1.2))
    ax = fig.add_subplot(1, 1, 1)
    ypos = np.arange(len(pi.features))[::-1]
    ax.barh(ypos, _nan(pi.mean), xerr=_nan(pi.std), color="tab:blue")
    ax.set(yticks=ypos, yticklabels=pi.features, xlabel="drop in average precision of P(quasar)",
           title="permutation importance (held-out folds)")
    ax.tick_params(axis="y", labelsize=7)
    paths.append(_save_png(fig, out_dir / TRAINING_PLOT_FILES[3]))

    fig = Figure(figsize=(6.0, 4.6))
    ax = fig.add_subplot(1, 1, 1)
    qc = e.threshold_curves["quasar"]
    ax.plot(_nan(qc.completeness), _nan(qc.purity), "-", color="k", label="classifier P(quasar)")
    for name, res in e.criteria.items():
        b = res.at_published_boundary
        # an undefined ratio (no quasar, or nothing selected) has no point to draw
        if np.isfinite(b.completeness) and np.isfinite(b.purity):
            ax.plot([b.completeness], [b.purity], "o", label=f"{name} (published boundary)")
    ax.axvline(COMPLETENESS_TARGET, color="0.6", lw=0.8, ls="--")
    ax.set(xlabel="quasar completeness", ylabel="quasar purity", xlim=(0, 1.01), ylim=(0, 1.01),
           title="classifier against the published criteria (held out)")
    ax.legend(loc="lower left", fontsize=7)
    paths.append(_save_png(fig, out_dir / TRAINING_PLOT_FILES[4]))
    if e.sky is not None:
        paths += _sky_plots(e, out_dir)
    return paths


def _sky_plots(e: TrainingEvaluation, out_dir: Path) -> list[Path]:
    """Quasar completeness and purity at both class mixes; the reliability diagram on the sky."""
    from matplotlib.figure import Figure

    thr = np.asarray(e.thresholds)
    sky = e.sky
    fig = Figure(figsize=(6.0, 4.4))
    ax = fig.add_subplot(1, 1, 1)
    lab = e.threshold_curves["quasar"]
    ax.plot(thr, _nan(lab.completeness), color="tab:blue", ls="--", label="completeness, labelled mix")
    ax.plot(thr, _nan(lab.purity), color="tab:orange", ls="--", label="purity, labelled mix")
    ax.plot(thr, _nan(sky.curve.completeness), color="tab:blue", label="completeness, sky mix")
    ax.plot(thr, _nan(sky.curve.purity), color="tab:orange", label="purity, sky mix")
    if sky.expected_purity is not None:
        ax.axhline(sky.expected_purity, color="0.3", lw=0.8, ls=":",
                   label=f"expected purity of the default list ({sky.expected_purity:.1%})")
    ax.axvline(e.threshold, color="0.6", lw=0.8, ls="--")
    ax.set(xlabel="threshold on P(quasar) (at the mix named)", ylim=(0, 1.02),
           title="held-out quasar completeness and purity")
    ax.legend(loc="lower left", fontsize=7)
    paths = [_save_png(fig, out_dir / SKY_PLOT_FILES[0])]

    r = sky.reliability
    fig = Figure(figsize=(4.8, 4.4))
    ax = fig.add_subplot(1, 1, 1)
    ax.plot([0, 1], [0, 1], color="0.7", lw=0.8)
    ax.errorbar(r["mean_predicted"], r["observed"], yerr=r["error"], fmt="s-", ms=3, capsize=2,
                label="held out, weighted to the sky mix")
    ax.set(xlabel="P(quasar) on the sky", ylabel="observed quasar fraction", xlim=(0, 1), ylim=(0, 1),
           title="reliability after the prior adjustment")
    ax.legend(loc="upper left", fontsize=7)
    paths.append(_save_png(fig, out_dir / SKY_PLOT_FILES[1]))
    return paths
