"""Comparison over time: what changed between two characterizations of the same gates.

:func:`compare` takes two result files, or two batch directories (written by
:func:`robusttomo.batch.run_batch`, matched by job label), and reports per gate the change in
average gate fidelity and diamond distance with a 95% interval, the diamond distance between
the two reconstructed error channels, and a flag where a change exceeds the combined
uncertainty.  :func:`write_comparison` writes ``compare.json`` and ``compare.html``.
"""

from __future__ import annotations

import html
import json
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from robusttomo import _io
from robusttomo.errors import DataError

__all__ = ["Change", "Comparison", "GateComparison", "compare", "write_comparison"]


@dataclass(frozen=True)
class Change:
    """``new - old`` of one figure with its 95% interval.

    The interval combines the two intervals' half-widths on each side in quadrature
    (independent runs): ``low = delta - hypot(new.value - new.low, old.high - old.value)``,
    ``high = delta + hypot(new.high - new.value, old.value - old.low)``.  ``nan`` without
    bootstrap intervals.

    Attributes
    ----------
    old, new, delta, low, high : float
    significant : bool
        The interval excludes 0 (the change exceeds the combined uncertainty).
    """

    old: float
    new: float
    delta: float
    low: float
    high: float
    significant: bool

    def as_dict(self) -> dict[str, object]:
        """JSON form (``None`` for non-finite numbers)."""
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                for k, v in self.__dict__.items()}


@dataclass(frozen=True)
class GateComparison:
    """One gate present in both inputs.

    Attributes
    ----------
    label : str
    target : str
        Target label (of the new result).
    fidelity : Change
        Average gate fidelity of the noisy gate (a fidelity: positive delta = better).
    diamond : Change
        Diamond distance to the target (an error: positive delta = worse).
    channel_distance : float
        Diamond distance ``(1/2)||L_old - L_new||_diamond`` between the reconstructed error
        channels (equal to that between the noisy gates, the target being the same unitary).
    flagged : bool
        Either change is significant.
    note : str
        E.g. different targets; ``""`` otherwise.
    """

    label: str
    target: str
    fidelity: Change
    diamond: Change
    channel_distance: float
    flagged: bool
    note: str = ""


@dataclass(frozen=True)
class Comparison:
    """Result of :func:`compare`.

    Attributes
    ----------
    old, new : str
        The inputs as given.
    gates : tuple of GateComparison
        Sorted by decreasing ``|fidelity.delta|``.
    only_old, only_new : tuple of str
        Labels present in one input only (or failed in the other).
    """

    old: str
    new: str
    gates: tuple[GateComparison, ...]
    only_old: tuple[str, ...]
    only_new: tuple[str, ...]

    def as_dict(self) -> dict[str, object]:
        """JSON form."""
        return {"schema_version": 1, "kind": "robusttomo-comparison", "old": self.old, "new": self.new,
                "gates": [{"label": g.label, "target": g.target, "fidelity": g.fidelity.as_dict(),
                           "diamond_distance": g.diamond.as_dict(),
                           "channel_distance": g.channel_distance if math.isfinite(g.channel_distance) else None,
                           "flagged": g.flagged, "note": g.note} for g in self.gates],
                "only_old": list(self.only_old), "only_new": list(self.only_new)}


def _change(old: Any, new: Any) -> Change:
    delta = float(new.value) - float(old.value)
    low = delta - math.hypot(new.value - new.low, old.high - old.value)
    high = delta + math.hypot(new.high - new.value, old.value - old.low)
    sig = bool(math.isfinite(low) and math.isfinite(high) and (low > 0 or high < 0))
    return Change(old=float(old.value), new=float(new.value), delta=delta, low=float(low), high=float(high),
                  significant=sig)


def _results_of(path: Path) -> dict[str, Path]:
    """Label -> result file, for a result file or a batch directory."""
    if path.is_dir():
        summary = path / "summary.json"
        if not summary.is_file():
            raise DataError(f"{path}: not a batch directory (no summary.json); give a result file or the output "
                            "directory of 'robusttomo batch'")
        try:
            doc = json.loads(summary.read_text(encoding="utf-8"))
            rows = doc["rows"]
            if doc.get("kind") != "robusttomo-batch-summary":
                raise KeyError("kind")
            return {str(r["label"]): path / str(r["result"]) for r in rows if r.get("status") != "failed"}
        except (OSError, ValueError, KeyError, TypeError) as err:
            raise DataError(f"{summary}: not a robusttomo batch summary ({str(err)[:60]})") from None
    if path.is_file():
        return {path.stem: path}
    raise DataError(f"{path}: no such result file or batch directory")


def compare(old: str | os.PathLike[str], new: str | os.PathLike[str]) -> Comparison:
    """Compare two characterizations gate by gate.

    Parameters
    ----------
    old, new : str or path-like
        Each a result file (``robusttomo analyze``) or a batch output directory.  Two result
        files are compared with each other whatever their names; batch directories are
        matched by job label.

    Returns
    -------
    Comparison

    Raises
    ------
    DataError
        A missing or unreadable input, or results on different numbers of qubits.
    """
    from robusttomo.assess import load_reconstruction
    from robusttomo.metrics import diamond_distance

    po, pn = Path(old), Path(new)
    ro, rn = _results_of(po), _results_of(pn)
    if po.is_file() and pn.is_file():
        pairs = [(pn.stem if pn.stem == po.stem else f"{po.stem} -> {pn.stem}", ro[po.stem], rn[pn.stem])]
        only_old: tuple[str, ...] = ()
        only_new: tuple[str, ...] = ()
    else:
        if po.is_file() != pn.is_file():
            raise DataError(f"{old} and {new}: give two result files or two batch directories")
        pairs = [(k, ro[k], rn[k]) for k in sorted(set(ro) & set(rn))]
        only_old, only_new = tuple(sorted(set(ro) - set(rn))), tuple(sorted(set(rn) - set(ro)))
    gates = []
    for label, a, b in pairs:
        ra, rb = load_reconstruction(a), load_reconstruction(b)
        if ra.n_qubits != rb.n_qubits:
            raise DataError(f"{b}: gate {label!r} has {rb.n_qubits} qubit(s) but {a} has {ra.n_qubits}")
        note = "" if ra.target_label == rb.target_label else (
            f"targets differ ({ra.target_label} vs {rb.target_label})")
        try:
            dist = float(diamond_distance(ra.error_channel, rb.error_channel))
        except Exception as err:  # noqa: BLE001 - a solver failure leaves the other figures usable
            dist, note = math.nan, (note + "; " if note else "") + f"channel distance failed: {str(err)[:80]}"
        fid = _change(ra.figures.average_gate_fidelity, rb.figures.average_gate_fidelity)
        dia = _change(ra.figures.diamond_distance, rb.figures.diamond_distance)
        gates.append(GateComparison(label=label, target=rb.target_label, fidelity=fid, diamond=dia,
                                    channel_distance=dist, flagged=fid.significant or dia.significant, note=note))
    gates.sort(key=lambda g: (-abs(g.fidelity.delta), g.label))
    return Comparison(old=str(old), new=str(new), gates=tuple(gates), only_old=only_old, only_new=only_new)


def _f(x: float) -> str:
    return "" if not math.isfinite(x) else f"{x:.5g}"


def write_comparison(comp: Comparison, directory: str | os.PathLike[str], *, force: bool = False) -> tuple[Path, Path]:
    """Write ``compare.json`` and ``compare.html`` into ``directory`` (created if missing).

    Returns
    -------
    tuple of Path
        ``(json_path, html_path)``.  Existing files are refused unless ``force``.
    """
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    pj, ph = out / "compare.json", out / "compare.html"
    for p in (pj, ph):
        _io.check_output_path(p, force=force)
    rows = []
    for g in comp.gates:
        cls = " style='background:#fdd'" if g.flagged else ""
        rows.append(f"<tr{cls}><td>{html.escape(g.label)}</td><td>{html.escape(g.target)}</td>"
                    f"<td>{_f(g.fidelity.old)} &rarr; {_f(g.fidelity.new)}</td>"
                    f"<td>{_f(g.fidelity.delta)} [{_f(g.fidelity.low)}, {_f(g.fidelity.high)}]</td>"
                    f"<td>{_f(g.diamond.old)} &rarr; {_f(g.diamond.new)}</td>"
                    f"<td>{_f(g.diamond.delta)} [{_f(g.diamond.low)}, {_f(g.diamond.high)}]</td>"
                    f"<td>{_f(g.channel_distance)}</td><td>{'CHANGED' if g.flagged else ''}</td>"
                    f"<td>{html.escape(g.note)}</td></tr>")
    extra = ""
    if comp.only_old or comp.only_new:
        extra = (f"<p>only in old: {html.escape(', '.join(comp.only_old)) or '-'}; "
                 f"only in new: {html.escape(', '.join(comp.only_new)) or '-'}</p>")
    page = ("<!DOCTYPE html><html><head><meta charset='utf-8'><title>robusttomo comparison</title>"
            "<style>body{font-family:sans-serif}td,th{border:1px solid #ccc;padding:3px 6px}"
            "table{border-collapse:collapse}</style></head><body>"
            f"<h1>Comparison</h1><p>old: {html.escape(comp.old)}<br>new: {html.escape(comp.new)}</p>"
            "<p>Changes are new - old with 95% intervals (half-widths combined in quadrature); CHANGED marks a "
            "change whose interval excludes 0.</p><table><tr><th>gate</th><th>target</th><th>fidelity</th>"
            "<th>change [95%]</th><th>diamond distance</th><th>change [95%]</th>"
            "<th>distance between channels</th><th>flag</th><th>note</th></tr>"
            + "\n".join(rows) + f"</table>{extra}</body></html>\n")
    with _io.atomic_path(pj, force=force) as tmp:
        tmp.write_text(json.dumps(comp.as_dict(), indent=1, allow_nan=False) + "\n", encoding="utf-8")
    with _io.atomic_path(ph, force=force) as tmp:
        tmp.write_text(page, encoding="utf-8")
    return pj, ph
