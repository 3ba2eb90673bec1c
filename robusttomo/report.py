"""The visual report of an analysis: one self-contained HTML file, its PNG figures, a JSON summary.

:func:`write_report` writes ``report.html`` (figures embedded as base64 PNG, inline style, no
script and no network access), the figures as PNG files and ``summary.json``, whose keys are
a contract documented in ``docs/file-formats.md`` ("Report summary").  :func:`report_summary`
returns that summary as a dictionary and :func:`summary_table` the plain-text table the
command line prints.

Every string that comes from a user or a file (labels, warnings, messages) is HTML-escaped.
"""

from __future__ import annotations

import base64
import html
import io
import json
import math
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from robusttomo import _io, _pauli
from robusttomo._version import __version__
from robusttomo.channels import Channel

__all__ = ["FIGURE_NAMES", "SUMMARY_KEYS", "ReportFiles", "report_summary", "summary_table", "write_report"]

#: The keys every ``summary.json`` holds (more may follow; see docs/file-formats.md).
SUMMARY_KEYS = (
    "n_qubits", "target", "average_gate_fidelity", "entanglement_fidelity", "diamond_distance",
    "unitarity", "diamond_distance_range", "spam_constant", "ptm", "decays", "pauli_error_rates",
    "error_generator", "diagnostics", "warnings",
)
#: The PNG figures of a report, in the order they appear.
FIGURE_NAMES = ("decays.png", "lambdas.png", "ptm.png", "generator.png")

_SUMMARY_KIND = "robusttomo-report-summary"
#: Decay curves shown besides the identity probe's.
_N_SHOWN_PROBES = 4

# A neutral palette of our own: ink, muted text, one cool accent, one warm accent.
_INK = "#1d2433"
_MUTED = "#5b6475"
_ACCENT = "#2a6f97"
_WARM = "#c26b1a"
_GRID = "#d9dde3"
_SERIES = ("#2a6f97", "#c26b1a", "#4f7d3a", "#8a4f9e", "#9b3d3d")


@dataclass(frozen=True)
class ReportFiles:
    """Where a report was written.

    Attributes
    ----------
    directory : Path
    html : Path
        ``directory / "report.html"``, self-contained.
    summary : Path
        ``directory / "summary.json"``.
    figures : tuple of Path
        The PNG figures, named as in :data:`FIGURE_NAMES`.
    """

    directory: Path
    html: Path
    summary: Path
    figures: tuple[Path, ...]


# ---- numbers --------------------------------------------------------------------------------
def _num(x: object) -> float | None:
    """A JSON-safe float: NaN and infinities become None (JSON null)."""
    v = float(x)  # type: ignore[arg-type]
    return v if math.isfinite(v) else None


def _interval(iv: Any) -> dict[str, Any]:
    return {"value": _num(iv.value), "ci95": [_num(iv.low), _num(iv.high)]}


def _fmt(x: object, digits: int = 5) -> str:
    try:
        v = float(x)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(v):
        return "n/a"
    if v != 0 and (abs(v) < 10 ** -(digits - 1) or abs(v) >= 10**6):
        return f"{v:.{max(digits - 2, 2)}e}"
    return f"{v:.{digits}f}"


def _fmt_ci(iv: Any, digits: int = 5) -> str:
    if not (math.isfinite(iv.low) and math.isfinite(iv.high)):
        return "n/a (not computed: no bootstrap, or see the warnings)"
    return f"[{_fmt(iv.low, digits)}, {_fmt(iv.high, digits)}]"


def _chi2_p(chi2: float, dof: int) -> float:
    import scipy.stats

    return float(scipy.stats.chi2.sf(chi2, dof)) if dof > 0 and math.isfinite(chi2) else float("nan")


# ---- what the figures need ------------------------------------------------------------------
def _reference_channel(rec: Any) -> Channel | None:
    """The error channel ``L`` of the reference run, when the result holds it."""
    if rec.mode.value == "reference":
        return rec.error_channel
    ch = getattr(rec, "reference_channel", None)  # held by results that store the reference fit
    return ch if isinstance(ch, Channel) else None


def _predicted_lambdas(decays: Any, measured: Channel) -> np.ndarray:
    """``lambda_A = tr(B_A^T B) / (d*d - 1)`` of every probe for a channel with unital block ``B``."""
    d2m1 = 4**decays.n_qubits - 1
    blocks = decays.probes.unital_blocks.reshape(decays.probes.n_probes, -1)
    return blocks @ np.asarray(measured.unital_block).reshape(-1) / d2m1


def _runs(rec: Any) -> list[tuple[str, Any, np.ndarray | None]]:
    """(title, decays, predicted lambdas or None) for each run of the analysis."""
    ref = _reference_channel(rec)
    out: list[tuple[str, Any, np.ndarray | None]] = []
    out.append(("reference run" if rec.interleaved_decays is not None else "decays",
                rec.decays, None if ref is None else _predicted_lambdas(rec.decays, ref)))
    if rec.interleaved_decays is not None:
        pred = None
        if ref is not None:
            rg = Channel.from_unitary(rec.target_unitary)
            composite = rec.error_channel @ rg @ ref @ rg.adjoint()
            pred = _predicted_lambdas(rec.interleaved_decays, composite)
        out.append((f"interleaved run ({rec.target_label})", rec.interleaved_decays, pred))
    return out


def _shown_probes(decays: Any) -> list[int]:
    """The identity probe and the most informative others: most lengths, then largest |lambda|."""
    ident = decays.probes.identity_index
    n_len = np.sum(np.isfinite(decays.means), axis=1)
    order = sorted((i for i in range(decays.probes.n_probes) if i != ident),
                   key=lambda i: (-int(n_len[i]), -abs(float(decays.lambdas[i])), i))
    first = [] if ident is None else [int(ident)]
    return first + [int(i) for i in order[:_N_SHOWN_PROBES]]


# ---- summary --------------------------------------------------------------------------------
def _decay_list(decays: Any) -> list[dict[str, Any]]:
    return [{"probe": lab, "lambda": _num(lam), "stderr": _num(se)}
            for lab, lam, se in zip(decays.probes.labels, decays.lambdas, decays.lambda_stderr)]


def _constant_deviations(dec: Any) -> np.ndarray:
    """Per-probe constants minus the shared one, in units of their standard errors."""
    pc = np.asarray(dec.probe_constants, dtype=float)
    se = np.asarray(dec.probe_constants_stderr, dtype=float)
    ok = np.isfinite(pc) & np.isfinite(se) & (se > 0)
    return (pc[ok] - dec.spam_constant) / se[ok]


def _diagnostics(rec: Any) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for name, dec in (("reference", rec.decays), ("interleaved", rec.interleaved_decays)):
        if dec is None:
            continue
        dev = _constant_deviations(dec)
        out[f"{name}_decay_fit"] = {
            "chi2": _num(dec.chi2), "dof": int(dec.dof), "reduced_chi2": _num(dec.reduced_chi2),
            "p_value": _num(_chi2_p(dec.chi2, dec.dof)),
            "spam_constant": _num(dec.spam_constant), "spam_constant_stderr": _num(dec.spam_constant_stderr),
            "probe_constants_rms_deviation": _num(np.sqrt(np.mean(dev**2))) if dev.size else None,
            "probe_constants_count": int(dev.size),
            "constant_spread_p": _num(dec.constant_spread_p),
            "lengths": [int(m) for m in dec.lengths],
            "n_sequences": [int(k) for k in dec.n_sequences],
        }
    out["solver"] = rec.solver
    out["solver_status"] = rec.solver_status
    out["solver_fell_back"] = bool(rec.solver_fell_back)
    out["constraint_distance"] = _num(rec.constraint_distance)
    out["unital_block_error"] = _num(getattr(rec, "unital_block_error", float("nan")))
    out["chosen_model"] = rec.chosen_model
    out["decay_fidelity"] = _interval(rec.figures.decay_fidelity)
    out["coherent_share"] = _interval(rec.figures.coherent_share)
    return out


def report_summary(rec: Any) -> dict[str, Any]:
    """The JSON summary of an analysis (the contract of ``summary.json``).

    Parameters
    ----------
    rec : robusttomo.assess.Reconstruction

    Returns
    -------
    dict
        JSON-ready (floats, strings, lists, dicts; NaN written as ``None``).  Keys: every
        entry of :data:`SUMMARY_KEYS` plus ``schema_version``, ``kind``, ``mode``,
        ``package_version``, fingerprints, ranges, models and the interleaved comparison; the
        meaning of each is in docs/file-formats.md ("Report summary").  Figures describe the
        noisy operation against its target; ``"ptm"`` is the estimated error channel's PTM
        (rows, Pauli order, qubit 0 leftmost).
    """
    from robusttomo.assess import Reconstruction

    if not isinstance(rec, Reconstruction):
        raise TypeError(f"'rec' must be a Reconstruction; got {type(rec).__name__}")
    f = rec.figures
    span = f.diamond_distance_range
    labels = _pauli.pauli_labels(rec.n_qubits)
    warnings = list(dict.fromkeys(rec.warnings))
    nu = np.asarray(rec.nonunital_ranges, dtype=float)
    est_nu = np.asarray(rec.error_channel.nonunital_vector)
    return {
        "schema_version": 1,
        "kind": _SUMMARY_KIND,
        "package_version": rec.package_version,
        "mode": rec.mode.value,
        "n_qubits": int(rec.n_qubits),
        "target": rec.target_label,
        "average_gate_fidelity": _interval(f.average_gate_fidelity),
        "entanglement_fidelity": _interval(f.entanglement_fidelity),
        "diamond_distance": _interval(f.diamond_distance),
        "unitarity": _interval(f.unitarity),
        "coherent_share": _interval(f.coherent_share),
        "decay_fidelity": _interval(f.decay_fidelity),
        "diamond_distance_range": [_num(span.low), _num(span.high)],
        "diamond_distance_range_detail": {"upper_is_bound": bool(span.high_is_bound), "method": span.method},
        "spam_constant": _num(rec.decays.spam_constant),
        "ptm": [[float(x) for x in row] for row in np.asarray(rec.error_channel.ptm)],
        "noisy_gate_ptm": [[float(x) for x in row] for row in np.asarray(rec.noisy_gate.ptm)],
        "decays": _decay_list(rec.decays),
        "interleaved_decays": None if rec.interleaved_decays is None else _decay_list(rec.interleaved_decays),
        "pauli_error_rates": {k: _num(v.value) for k, v in f.pauli_error_rates.items()},
        "pauli_error_rates_ci95": {k: [_num(v.low), _num(v.high)] for k, v in f.pauli_error_rates.items()},
        "error_generator": {"hamiltonian": {k: _num(v.value) for k, v in f.hamiltonian.items()},
                            "stochastic": {k: _num(v.value) for k, v in f.stochastic.items()}},
        "error_generator_ci95": {"hamiltonian": {k: [_num(v.low), _num(v.high)] for k, v in f.hamiltonian.items()},
                                 "stochastic": {k: [_num(v.low), _num(v.high)] for k, v in f.stochastic.items()}},
        "nonunital_ranges": [{"entry": f"R[{lab},I]", "estimate": _num(e), "min": _num(lo), "max": _num(hi)}
                             for lab, e, (lo, hi) in zip(labels[1:], est_nu, nu)],
        "models": [{"name": m.name, "n_parameters": int(m.n_parameters), "chi2": _num(m.chi2),
                    "criterion": _num(m.criterion), "heldout_chi2": _num(m.heldout_chi2),
                    "average_gate_fidelity": _num(m.average_gate_fidelity),
                    "diamond_distance": _num(m.diamond_distance), "chosen": m.name == rec.chosen_model}
                   for m in rec.models],
        "chosen_model": rec.chosen_model,
        "classic_interleaved": None if rec.classic_interleaved is None else {
            "error": _num(rec.classic_interleaved.error), "low_bound": _num(rec.classic_interleaved.low_bound),
            "high_bound": _num(rec.classic_interleaved.high_bound),
            "reference_decay": _num(rec.classic_interleaved.reference_decay),
            "interleaved_decay": _num(rec.classic_interleaved.interleaved_decay)},
        "plan_fingerprint": rec.plan_fingerprint,
        "counts_fingerprint": rec.counts_fingerprint,
        "options": {str(k): (v if isinstance(v, (str, int, float, bool)) or v is None else str(v))
                    for k, v in rec.options.items()},
        "diagnostics": _diagnostics(rec),
        "warnings": warnings,
    }


def summary_table(rec: Any) -> str:
    """Plain-text table of the figures of merit with their 95% intervals (what ``analyze`` prints).

    Parameters
    ----------
    rec : robusttomo.assess.Reconstruction

    Returns
    -------
    str
        Several lines, ending with a newline.
    """
    f = rec.figures
    what = (f"error of {rec.target_label} (interleaved run)" if rec.mode.value == "interleaved"
            else "error channel after every Clifford (reference run)")
    rows = [
        ("average gate fidelity", f.average_gate_fidelity),
        ("entanglement fidelity", f.entanglement_fidelity),
        ("diamond distance", f.diamond_distance),
        ("unitarity", f.unitarity),
        ("coherent share of infidelity", f.coherent_share),
        ("fidelity from decays alone" + (" (classic interleaved)" if rec.mode.value == "interleaved"
                                          else " (identity probe)"), f.decay_fidelity),
    ]
    width = max(len(r[0]) for r in rows)
    lines = [f"{rec.n_qubits}-qubit {what}; bootstrap replicates: {rec.options.get('bootstrap', '?')}",
             f"{'figure':<{width}}  {'estimate':>10}  95% interval"]
    for name, iv in rows:
        lines.append(f"{name:<{width}}  {_fmt(iv.value):>10}  {_fmt_ci(iv)}")
    span = f.diamond_distance_range
    kind = "bound" if span.high_is_bound else "attained"
    if span.high_is_bound and math.isfinite(span.attained_max):
        kind += f"; largest attained {_fmt(span.attained_max)}"
    lines.append(f"{'diamond distance range':<{width}}  {'':>10}  [{_fmt(span.low)}, {_fmt(span.high)}] "
                 f"(upper end {kind}; over channels consistent with the data)")
    if rec.classic_interleaved is not None:
        ci = rec.classic_interleaved
        lines.append(f"{'classic interleaved error':<{width}}  {_fmt(ci.error):>10}  "
                     f"bounds [{_fmt(ci.low_bound)}, {_fmt(ci.high_bound)}]")
    lines.append(f"model the data support: {rec.chosen_model}")
    for w in dict.fromkeys(rec.warnings):
        lines.append(f"warning: {w}")
    return "\n".join(lines) + "\n"


# ---- figures --------------------------------------------------------------------------------
def _new_figure(width: float, height: float):
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=110)
    fig.patch.set_facecolor("white")
    return fig


def _style(ax) -> None:
    ax.grid(True, color=_GRID, linewidth=0.7)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_MUTED)
    ax.tick_params(colors=_INK, labelsize=8)
    ax.title.set_color(_INK)
    ax.xaxis.label.set_color(_INK)
    ax.yaxis.label.set_color(_INK)


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight", metadata={"Software": None})
    return buf.getvalue()


def _short(label: str, limit: int = 26) -> str:
    return label if len(label) <= limit else label[: limit - 3] + "..."


def _fig_decays(rec: Any) -> bytes:
    runs = _runs(rec)
    fig = _new_figure(5.2 * len(runs), 4.6)
    for k, (title, dec, _) in enumerate(runs):
        ax = fig.add_subplot(1, len(runs), k + 1)
        ms = np.asarray(dec.lengths, dtype=float)
        grid = np.arange(1, int(ms.max()) + 1, dtype=float)
        for j, a in enumerate(_shown_probes(dec)):
            color = _SERIES[j % len(_SERIES)]
            ok = np.isfinite(dec.means[a])
            name = "identity" if a == dec.probes.identity_index else f"probe {_short(dec.probes.labels[a])}"
            ax.errorbar(ms[ok], dec.means[a, ok], yerr=dec.stderr[a, ok], fmt="o", ms=4, color=color,
                        capsize=2.5, elinewidth=1, label=f"{name} (lambda {dec.lambdas[a]:.4f})")
            ax.plot(grid, dec.spam_constant * dec.lambdas[a] ** (grid - 1), "-", color=color, lw=1.2, alpha=0.85)
        ax.set_xlabel("sequence length m")
        ax.set_ylabel("filtered mean f(m)")
        ax.set_title(f"{title}: data (1 s.e.) and fit c·lambda^(m-1)", fontsize=9)
        _style(ax)
        ax.legend(fontsize=7, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncol=1)
    fig.tight_layout()
    return _png(fig)


def _fig_lambdas(rec: Any) -> bytes:
    runs = _runs(rec)
    rows = sum(2 if pred is not None else 1 for _, _, pred in runs)
    fig = _new_figure(10.5, 2.5 * rows + 0.4)
    row = 0
    for title, dec, pred in runs:
        order = np.argsort(-np.asarray(dec.lambdas))
        x = np.arange(order.size)
        row += 1
        ax = fig.add_subplot(rows, 1, row)
        ax.errorbar(x, dec.lambdas[order], yerr=1.96 * dec.lambda_stderr[order], fmt="o", ms=2.5,
                    color=_ACCENT, elinewidth=0.8, capsize=0, label="fitted lambda (95% error bar)")
        if pred is not None:
            ax.plot(x, pred[order], "_", ms=7, mew=1.6, color=_WARM, label="prediction of the estimated channel")
        ax.set_ylabel("lambda")
        note = "" if pred is not None else " (no prediction: this result does not hold the reference channel)"
        ax.set_title(f"{title}: {dec.probes.n_probes} probe decays{note}", fontsize=9)
        _style(ax)
        ax.legend(fontsize=7, frameon=False, loc="upper right")
        if pred is None:
            ax.set_xlabel("probe (sorted by fitted lambda)")
            continue
        row += 1
        ax2 = fig.add_subplot(rows, 1, row, sharex=ax)
        se = np.where(dec.lambda_stderr > 0, dec.lambda_stderr, np.nan)
        z = (dec.lambdas - pred) / se
        ax2.plot(x, z[order], "o", ms=2.5, color=_ACCENT)
        for level in (-2.0, 2.0):
            ax2.axhline(level, color=_WARM, lw=0.8, ls="--")
        ax2.axhline(0.0, color=_MUTED, lw=0.8)
        ax2.set_ylabel("(fit - prediction) / s.e.", fontsize=8)
        ax2.set_xlabel("probe (sorted by fitted lambda)")
        _style(ax2)
    fig.tight_layout()
    return _png(fig)


def _fig_ptm(rec: Any) -> bytes:
    est = np.asarray(rec.noisy_gate.ptm)
    tgt = np.asarray(Channel.from_unitary(rec.target_unitary).ptm)
    diff = est - tgt
    labels = _pauli.pauli_labels(rec.n_qubits)
    fig = _new_figure(13.0, 4.3)
    scale = max(float(np.max(np.abs(diff))), 1e-12)
    panels = (("estimate", est, 1.0), (f"target ({rec.target_label})", tgt, 1.0),
              ("estimate - target", diff, scale))
    for k, (title, mat, vmax) in enumerate(panels):
        ax = fig.add_subplot(1, 3, k + 1)
        im = ax.imshow(mat, cmap="RdBu_r", vmin=-vmax, vmax=vmax, interpolation="nearest")
        ax.set_title(title, fontsize=10, color=_INK)
        if len(labels) <= 16:
            ax.set_xticks(range(len(labels)), labels, rotation=90, fontsize=6.5)
            ax.set_yticks(range(len(labels)), labels, fontsize=6.5)
        else:
            ax.set_xticks([])
            ax.set_yticks([])
        ax.set_xlabel("input Pauli j", fontsize=8)
        ax.set_ylabel("output Pauli i", fontsize=8)
        cb = fig.colorbar(im, ax=ax, fraction=0.046, pad=0.04)
        cb.ax.tick_params(labelsize=7)
    fig.tight_layout()
    return _png(fig)


def _fig_generator(rec: Any) -> bytes:
    f = rec.figures
    labels = list(f.hamiltonian)
    x = np.arange(len(labels))
    fig = _new_figure(min(16.0, max(6.0, 0.38 * len(labels) + 2.0)), 5.0)
    parts = (("coherent part: Hamiltonian rates h_P (rad)", f.hamiltonian, _ACCENT),
             ("incoherent part: stochastic rates s_P", f.stochastic, _WARM))
    for k, (title, rates, color) in enumerate(parts):
        ax = fig.add_subplot(2, 1, k + 1)
        vals = np.array([rates[lab].value for lab in labels], dtype=float)
        lo = np.array([rates[lab].low for lab in labels], dtype=float)
        hi = np.array([rates[lab].high for lab in labels], dtype=float)
        ax.bar(x, np.nan_to_num(vals), color=color, alpha=0.85, width=0.7)
        ok = np.isfinite(lo) & np.isfinite(hi) & np.isfinite(vals)
        if ok.any():
            err = np.vstack([np.clip(vals[ok] - lo[ok], 0, None), np.clip(hi[ok] - vals[ok], 0, None)])
            ax.errorbar(x[ok], vals[ok], yerr=err, fmt="none", ecolor=_INK, elinewidth=0.9, capsize=2)
        ax.axhline(0.0, color=_MUTED, lw=0.8)
        ax.set_xticks(x, labels, rotation=90 if len(labels) > 15 else 0, fontsize=7.5 if len(labels) <= 15 else 6)
        ax.set_title(title + " with 95% intervals", fontsize=9)
        _style(ax)
    fig.tight_layout()
    return _png(fig)


def _figures(rec: Any) -> dict[str, bytes]:
    return {"decays.png": _fig_decays(rec), "lambdas.png": _fig_lambdas(rec), "ptm.png": _fig_ptm(rec),
            "generator.png": _fig_generator(rec)}


# ---- HTML -----------------------------------------------------------------------------------
def _e(x: object) -> str:
    return html.escape(str(x), quote=True)


_CSS = f"""
:root {{ --ink: {_INK}; --muted: {_MUTED}; --accent: {_ACCENT}; --warm: {_WARM}; --line: {_GRID}; }}
* {{ box-sizing: border-box; }}
body {{ margin: 0; background: #f4f5f7; color: var(--ink);
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }}
main {{ max-width: 1120px; margin: 0 auto; padding: 28px 24px 48px; }}
header {{ border-bottom: 3px solid var(--accent); padding-bottom: 10px; margin-bottom: 22px; }}
h1 {{ font-size: 24px; margin: 0 0 4px; font-weight: 650; }}
h2 {{ font-size: 18px; margin: 0 0 10px; font-weight: 620; }}
.sub {{ color: var(--muted); margin: 0; }}
section {{ background: #fff; border: 1px solid var(--line); border-radius: 6px; padding: 18px 20px;
          margin: 0 0 18px; }}
.cards {{ display: grid; grid-template-columns: repeat(auto-fit, minmax(200px, 1fr)); gap: 12px; }}
.card {{ border: 1px solid var(--line); border-left: 4px solid var(--accent); border-radius: 4px;
        padding: 10px 12px; background: #fafbfc; }}
.card .k {{ color: var(--muted); font-size: 12.5px; text-transform: uppercase; letter-spacing: .04em; }}
.card .v {{ font-size: 21px; font-weight: 600; font-variant-numeric: tabular-nums; }}
.card .ci {{ color: var(--muted); font-size: 12.5px; font-variant-numeric: tabular-nums; }}
table {{ border-collapse: collapse; width: 100%; font-size: 13.5px; font-variant-numeric: tabular-nums; }}
th, td {{ text-align: left; padding: 5px 8px; border-bottom: 1px solid var(--line); vertical-align: top; }}
th {{ color: var(--muted); font-weight: 600; font-size: 12.5px; }}
td.num {{ text-align: right; white-space: nowrap; }}
td.nw {{ white-space: nowrap; }}
tr.chosen td {{ background: #eef5f9; font-weight: 600; }}
code, .fp {{ font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: 12.5px; }}
figure {{ margin: 8px 0 14px; }}
figure img {{ max-width: 100%; height: auto; border: 1px solid var(--line); border-radius: 4px; }}
figcaption {{ color: var(--muted); font-size: 13px; margin-top: 4px; }}
ul.warn li {{ color: #7a3e00; }}
.note {{ color: var(--muted); font-size: 13.5px; }}
"""


def _card(key: str, value: str, ci: str) -> str:
    return f'<div class="card"><div class="k">{_e(key)}</div><div class="v">{_e(value)}</div>' \
           f'<div class="ci">{_e(ci)}</div></div>'


def _rows(rows: Sequence[Sequence[object]], *, num_cols: Sequence[int] = (), nowrap: Sequence[int] = (),
          chosen: int | None = None) -> str:
    out = []
    for i, r in enumerate(rows):
        cls = ' class="chosen"' if chosen is not None and i == chosen else ""
        cells = "".join(f'<td class="num">{_e(c)}</td>' if j in num_cols
                        else f'<td class="nw">{_e(c)}</td>' if j in nowrap else f"<td>{_e(c)}</td>"
                        for j, c in enumerate(r))
        out.append(f"<tr{cls}>{cells}</tr>")
    return "".join(out)


def _table(head: Sequence[str], rows: Sequence[Sequence[object]], **kw: Any) -> str:
    th = "".join(f"<th>{_e(h)}</th>" for h in head)
    return f"<table><thead><tr>{th}</tr></thead><tbody>{_rows(rows, **kw)}</tbody></table>"


def _img(name: str, data: bytes, alt: str, caption: str) -> str:
    b64 = base64.b64encode(data).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{b64}" alt="{_e(alt)}" data-file="{_e(name)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def _run_rows(rec: Any, plan: Any) -> list[tuple[str, str]]:
    rows = [("what was characterized",
             f"error of {rec.target_label} in an interleaved run (one gate's error, SPAM-robust)"
             if rec.mode.value == "interleaved" else "error channel after every Clifford (reference run)"),
            ("qubits", str(rec.n_qubits)), ("target", rec.target_label)]
    for title, dec, _ in _runs(rec):
        rows.append((f"{title}: lengths", ", ".join(str(m) for m in dec.lengths)))
        rows.append((f"{title}: sequences per length", ", ".join(str(int(k)) for k in dec.n_sequences)))
        rows.append((f"{title}: probes", f"{dec.probes.n_probes} "
                     f"(control variate {'on' if dec.control_variate else 'off'})"))
    if plan is not None:
        rows.append(("shots per sequence", str(plan.shots)))
        rows.append(("plan seed", str(plan.seed)))
    for k, v in rec.options.items():
        rows.append((f"option {k}", str(v)))
    rows += [("plan fingerprint", rec.plan_fingerprint), ("counts fingerprint", rec.counts_fingerprint),
             ("analysis version", f"robusttomo {rec.package_version}"),
             ("report version", f"robusttomo {__version__}"),
             ("solver", f"{rec.solver} ({rec.solver_status}{', after a fallback' if rec.solver_fell_back else ''})")]
    return rows


def _diagnostic_sentences(rec: Any) -> list[str]:
    out = []
    for title, dec, _ in _runs(rec):
        p = _chi2_p(dec.chi2, dec.dof)
        if math.isfinite(p):
            verdict = ("fits the data" if p >= 1e-3 else "fits the data poorly, so the model of one fixed error "
                       "channel may not hold")
            out.append(f"{title}: the decay model c·lambda^(m-1) {verdict} (chi-square {dec.chi2:.1f} for "
                       f"{dec.dof} degrees of freedom, reduced {dec.reduced_chi2:.2f}, p = {p:.2g}).")
        dev = _constant_deviations(dec)
        sp = dec.constant_spread_p
        if dev.size and math.isfinite(sp):
            agree = ("agree with the shared constant within their errors, as gate-independent noise predicts"
                     if sp >= 1e-3 else "spread more than their errors allow: the noise may depend on the gate")
            probes = f"{dev.size} probe{'s' if dev.size != 1 else ''}"
            out.append(f"{title}: the per-probe SPAM constants ({probes} fitted with their own free constant) "
                       f"deviate from the shared one by {np.sqrt(np.mean(dev**2)):.2f} standard errors (rms) and "
                       f"{agree} (p = {sp:.2g}).")
        out.append(f"{title}: shared SPAM constant c = {dec.spam_constant:.4f} ± {dec.spam_constant_stderr:.4f} "
                   "(1 for perfect preparation and readout; it is divided out of every decay).")
    out.append(f"The completely-positive constraints moved the unital block by {rec.constraint_distance:.3g} "
               "(Frobenius distance between the unconstrained and the CPTP fit); a value large against the "
               "statistical error means the data pull outside the physical channels.")
    ube = getattr(rec, "unital_block_error", float("nan"))
    if math.isfinite(ube):
        out.append(f"Bootstrap-predicted error of the unital block: {ube:.3g} (Frobenius norm).")
    out.append(f"Convex solver: {rec.solver}, status {rec.solver_status}"
               f"{'; the first solver failed and this one was used instead' if rec.solver_fell_back else ''}.")
    return out


_CAUTIONS = (
    "The analysis assumes gate-independent, time-stationary Markovian noise: one fixed error channel "
    "after every Clifford.  The diagnostics above flag some violations (spread of the per-probe "
    "constants, a poor decay fit), not all.",
    "No leakage out of the qubit space is modelled.",
    "The data fix the unital block of the channel, not its non-unital part (for example the direction "
    "of amplitude damping).  The point estimate picks the non-unital part by a documented rule; the "
    "table of ranges shows what the data leave open.",
    "Intervals come from a bootstrap over sequences; they cover statistical error, not a wrong model.",
    "These numbers support, and do not replace, the lab's own validation before hardware decisions.",
)


def _html(rec: Any, figs: Mapping[str, bytes], plan: Any) -> str:
    f = rec.figures
    span = f.diamond_distance_range
    title = (f"Error of gate {rec.target_label}" if rec.mode.value == "interleaved"
             else "Error channel after every Clifford")
    upper_kind = "a certified bound" if span.high_is_bound else "attained by a channel"
    if span.high_is_bound and math.isfinite(span.attained_max):
        upper_kind += f"; the largest value attained by a channel found is {_fmt(span.attained_max)}"
    parts: list[str] = []
    parts.append(f"<header><h1>robusttomo report: {_e(title)}</h1>"
                 f'<p class="sub">{rec.n_qubits} qubit{"s" if rec.n_qubits > 1 else ""}, '
                 f"target {_e(rec.target_label)}, model supported by the data: {_e(rec.chosen_model)}</p></header>")
    cards = [
        _card("average gate fidelity", _fmt(f.average_gate_fidelity.value), "95%: " + _fmt_ci(f.average_gate_fidelity)),
        _card("diamond distance", _fmt(f.diamond_distance.value), "95%: " + _fmt_ci(f.diamond_distance)),
        _card("diamond distance range", f"{_fmt(span.low, 4)} to {_fmt(span.high, 4)}",
              "over channels consistent with the data"),
        _card("unitarity", _fmt(f.unitarity.value), "95%: " + _fmt_ci(f.unitarity)),
        _card("coherent share", _fmt(f.coherent_share.value, 3), "95%: " + _fmt_ci(f.coherent_share, 3)),
    ]
    parts.append(f'<section><h2>At a glance</h2><div class="cards">{"".join(cards)}</div></section>')

    # figures of merit
    rows = [
        ("average gate fidelity", _fmt(f.average_gate_fidelity.value), _fmt_ci(f.average_gate_fidelity),
         "1 = perfect; mean fidelity over pure input states"),
        ("entanglement fidelity", _fmt(f.entanglement_fidelity.value), _fmt_ci(f.entanglement_fidelity),
         "1 = perfect; overlap of the Choi states"),
        ("diamond distance", _fmt(f.diamond_distance.value), _fmt_ci(f.diamond_distance),
         "0 = perfect; worst-case error probability, (1/2)||E - U||"),
        ("diamond distance range", "", f"[{_fmt(span.low)}, {_fmt(span.high)}]",
         f"min and max over CPTP channels that fit the data (upper end {upper_kind}): {span.method}"),
        ("unitarity", _fmt(f.unitarity.value), _fmt_ci(f.unitarity), "1 for a purely coherent error"),
        ("coherent share of the infidelity", _fmt(f.coherent_share.value, 3), _fmt_ci(f.coherent_share, 3),
         "fraction due to the Hamiltonian part of the error generator"),
        ("fidelity from decays alone", _fmt(f.decay_fidelity.value), _fmt_ci(f.decay_fidelity),
         "classic interleaved estimate from the two identity decays, for comparison"
         if rec.mode.value == "interleaved" else "benchmarking-style number from the identity decay, for comparison"),
    ]
    ci = rec.classic_interleaved
    if ci is not None:
        rows.append(("classic interleaved error", _fmt(ci.error), f"bounds [{_fmt(ci.low_bound)}, {_fmt(ci.high_bound)}]",
                     f"from the identity decays {_fmt(ci.reference_decay)} (reference) and "
                     f"{_fmt(ci.interleaved_decay)} (interleaved); an error, not a fidelity"))
    labels = _pauli.pauli_labels(rec.n_qubits)
    nu = np.asarray(rec.nonunital_ranges, dtype=float)
    est_nu = np.asarray(rec.error_channel.nonunital_vector)
    nu_rows = [(f"R[{lab}, I]", _fmt(e), _fmt(lo), _fmt(hi), _fmt(hi - lo))
               for lab, e, (lo, hi) in zip(labels[1:], est_nu, nu)]
    parts.append(
        "<section><h2>Figures of merit</h2>"
        f"<p class=\"note\">Of the noisy operation against its target ({_e(rec.target_label)}); 95% bootstrap "
        "intervals.</p>"
        + _table(("figure", "estimate", "95% interval", "meaning"), rows, num_cols=(1,), nowrap=(2,))
        + "<h2 style=\"margin-top:16px\">What the data do not fix: the non-unital part</h2>"
          "<p class=\"note\">The decays determine the unital block of the error channel only.  For each "
          "non-unital PTM entry (how the channel moves the maximally mixed state), the range over the CPTP "
          "channels that fit the data within their 95% region, and the value the point estimate chose.</p>"
        + _table(("entry", "estimate", "min", "max", "width"), nu_rows, num_cols=(1, 2, 3, 4))
        + "</section>")

    parts.append(
        "<section><h2>Decays</h2>"
        + _img("decays.png", figs["decays.png"], "decay curves",
               "Filtered means f(m) per sequence length with one standard error, for the identity probe and "
               "the slowest-decaying probes, with the fitted c·lambda^(m-1) (one constant c shared by all probes).")
        + _img("lambdas.png", figs["lambdas.png"], "fitted decays against the model",
               "Every probe's fitted decay lambda with its 95% error bar, against the value the estimated "
               "channel predicts (tr(B_A^T B)/(d²-1)).")
        + "</section>")
    parts.append(
        "<section><h2>The estimated channel</h2>"
        + _img("ptm.png", figs["ptm.png"], "Pauli transfer matrices",
               "Pauli transfer matrices R[i, j] = tr(P_i E(P_j))/d of the estimated noisy operation, the target, "
               "and their difference (own color scale).  Pauli order II, IX, IY, ...; qubit 0 is the left letter.")
        + _img("generator.png", figs["generator.png"], "error generator rates",
               "Error generator of the error after the target: Hamiltonian (coherent) rates h_P, in radians "
               "(a rotation exp(-i theta/2 P) has h_P = theta/2), and stochastic rates s_P (about the "
               "probability of a P error).")
        + "</section>")

    pauli_rows = sorted(((k, v) for k, v in f.pauli_error_rates.items() if k != "I" * rec.n_qubits),
                        key=lambda kv: -kv[1].value)[:8]
    if pauli_rows:
        parts.append("<section><h2>Largest Pauli error probabilities</h2>"
                     "<p class=\"note\">Probabilities of the Pauli-twirled error (what a stabilizer simulator "
                     "would use).</p>"
                     + _table(("Pauli", "probability", "95% interval"),
                              [(k, _fmt(v.value), _fmt_ci(v)) for k, v in pauli_rows], num_cols=(1,), nowrap=(2,))
                     + "</section>")

    if rec.models:
        chosen_idx = next((i for i, m in enumerate(rec.models) if m.name == rec.chosen_model), None)
        mrows = [(m.name, m.n_parameters, _fmt(m.chi2, 2), _fmt(m.criterion, 2), _fmt(m.heldout_chi2, 2),
                  _fmt(m.average_gate_fidelity), _fmt(m.diamond_distance))
                 for m in rec.models]
        parts.append("<section><h2>Models side by side</h2>"
                     f"<p class=\"note\">Each model is fitted to the same decays.  The criterion weighs fit "
                     "quality against the number of parameters (smaller is better) and the choice is checked "
                     f"on held-out sequences.  The data support: <b>{_e(rec.chosen_model)}</b> (highlighted).</p>"
                     + _table(("model", "parameters", "chi-square", "criterion", "held-out chi-square",
                               "avg. gate fidelity", "diamond distance"), mrows,
                              num_cols=(1, 2, 3, 4, 5, 6), chosen=chosen_idx)
                     + "</section>")

    warn = list(dict.fromkeys(rec.warnings))
    warn_html = ("<ul class=\"warn\">" + "".join(f"<li>{_e(w)}</li>" for w in warn) + "</ul>" if warn
                 else "<p>No warnings.</p>")
    parts.append("<section><h2>Diagnostics</h2><ul>"
                 + "".join(f"<li>{_e(s)}</li>" for s in _diagnostic_sentences(rec)) + "</ul>"
                 + "<h2 style=\"margin-top:12px\">Warnings</h2>" + warn_html + "</section>")
    parts.append("<section><h2>Assumptions and cautions</h2><ul>"
                 + "".join(f"<li>{_e(c)}</li>" for c in _CAUTIONS) + "</ul></section>")
    parts.append("<section><h2>What was run</h2>"
                 + "".join(["<table><tbody>"] + [f"<tr><th>{_e(k)}</th><td class=\"fp\">{_e(v)}</td></tr>"
                                                  for k, v in _run_rows(rec, plan)] + ["</tbody></table>"])
                 + "</section>")
    body = "\n".join(parts)
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; img-src data:; "
            "style-src 'unsafe-inline'\">"
            f"<title>robusttomo report: {_e(title)}</title><style>{_CSS}</style></head>"
            f"<body><main>\n{body}\n</main></body></html>\n")


def write_report(rec: Any, directory: str | os.PathLike[str], *, force: bool = False,
                 plan: Any = None) -> ReportFiles:
    """Write ``report.html``, ``summary.json`` and the PNG figures of an analysis into a directory.

    Parameters
    ----------
    rec : robusttomo.assess.Reconstruction
        The analysis result.
    directory : str or path-like
        Output directory, created (with its parents) if missing.
    force : bool, default False
        Overwrite existing report files.  Without it, ``FileExistsError`` is raised before
        anything is written if any of the files exists.
    plan : robusttomo.plan.Plan, optional
        The plan, for the "what was run" table (shots, seed); must match the result's plan
        fingerprint.

    Returns
    -------
    ReportFiles

    Examples
    --------
    See ``docs/tutorial.md``; ``robusttomo report RESULT.h5 -o DIR`` calls this function.
    """
    from robusttomo.assess import Reconstruction

    if not isinstance(rec, Reconstruction):
        raise TypeError(f"'rec' must be a Reconstruction; got {type(rec).__name__}")
    if plan is not None and getattr(plan, "fingerprint", None) != rec.plan_fingerprint:
        raise ValueError("'plan' does not match the result: its fingerprint differs from the result's "
                         "plan_fingerprint; pass the plan the data were taken with")
    out = Path(directory)
    if out.exists() and not out.is_dir():
        raise FileExistsError(f"{out}: exists and is not a directory; choose another output directory")
    names = ("report.html", "summary.json", *FIGURE_NAMES)
    if not force:
        for name in names:
            if (out / name).exists():
                raise FileExistsError(f"{out / name}: output exists; choose another directory or pass --force "
                                      "(in Python force=True) to overwrite")
    summary = report_summary(rec)
    text = json.dumps(summary, indent=1, allow_nan=False) + "\n"
    figs = _figures(rec)
    page = _html(rec, figs, plan)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    for name in FIGURE_NAMES:
        with _io.atomic_path(out / name, force=force) as tmp:
            tmp.write_bytes(figs[name])
        paths.append(out / name)
    with _io.atomic_path(out / "summary.json", force=force) as tmp:
        tmp.write_text(text, encoding="utf-8")
    with _io.atomic_path(out / "report.html", force=force) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return ReportFiles(directory=out, html=out / "report.html", summary=out / "summary.json",
                       figures=tuple(paths))
