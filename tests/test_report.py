"""Tests of the HTML report, its figures and the JSON summary.

Reconstructions are built here from real decay fits (``estimate_decays`` on simulated data) plus
a known channel, so the report is tested independently of the convex reconstruction.
"""

from __future__ import annotations

import base64
import json
import math
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from robusttomo import metrics
from robusttomo.assess import (
    AnalysisMode,
    ClassicInterleaved,
    DiamondSpan,
    Figures,
    Interval,
    ModelSummary,
    Reconstruction,
)
from robusttomo.channels import Channel, depolarizing
from robusttomo.estimate import default_probes
from robusttomo.fit import estimate_decays
from robusttomo.generators import rates_from_channel
from robusttomo.plan import make_plan
from robusttomo.report import FIGURE_NAMES, SUMMARY_KEYS, _predicted_lambdas, report_summary, summary_table, \
    write_report
from robusttomo.simulate import Device, error_from_parts, simulate

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (RFC 2083), section 3.1
CZ = np.diag([1, 1, 1, -1]).astype(complex)


def _iv(v: float, half: float = 1e-3) -> Interval:
    return Interval(float(v), float(v) - half, float(v) + half)


def make_reconstruction(*, plan, counts, error: Channel, target=None, label="identity",
                        warnings=(), bootstrap=10) -> Reconstruction:
    """A Reconstruction from real decay fits and a given error channel (intervals +-1e-3)."""
    n = plan.n_qubits
    d = 2**n
    u = np.eye(d, dtype=complex) if target is None else np.asarray(target, dtype=complex)
    interleaved = plan.interleave is not None
    dec = estimate_decays(plan, counts, bootstrap=bootstrap, seed=1)
    dec_int = estimate_decays(plan, counts, bootstrap=bootstrap, seed=2, kind="interleaved") if interleaved else None
    gen = rates_from_channel(error)
    dd = metrics.diamond_distance(error)
    figs = Figures(
        average_gate_fidelity=_iv(metrics.average_gate_fidelity(error)),
        entanglement_fidelity=_iv(metrics.entanglement_fidelity(error)),
        diamond_distance=_iv(dd),
        diamond_distance_range=DiamondSpan(dd * 0.9, dd * 1.1, True, "test range <b>"),
        unitarity=_iv(metrics.unitarity(error)),
        coherent_share=_iv(metrics.coherent_share(error)),
        decay_fidelity=_iv(dec.average_gate_fidelity),
        pauli_error_rates={k: _iv(v) for k, v in metrics.pauli_error_rates(error).items()},
        hamiltonian={k: _iv(v) for k, v in gen.hamiltonian.items()},
        stochastic={k: _iv(v) for k, v in gen.stochastic.items()},
    )
    models = (
        ModelSummary("full", (d * d - 1) ** 2, 10.0, 20.0, 11.0, figs.average_gate_fidelity.value, dd, {},
                     np.array(error.ptm)),
        ModelSummary("pauli", d * d - 1, 30.0, 31.0, 40.0, 0.99, 0.01, {"P:Z": 0.01}, np.eye(d * d)),
    )
    nu = np.asarray(error.nonunital_vector)
    classic = ClassicInterleaved(0.01, 0.005, 0.015, 0.99, 0.98) if interleaved else None
    return Reconstruction(
        n_qubits=n, mode=AnalysisMode.INTERLEAVED if interleaved else AnalysisMode.REFERENCE,
        target_label=label, target_unitary=u, error_channel=error, figures=figs, models=models,
        chosen_model="full", decays=dec, interleaved_decays=dec_int,
        linear_unital_block=np.array(error.unital_block), constraint_distance=0.0,
        nonunital_ranges=np.column_stack([nu - 0.01, nu + 0.01]), solver="SCS", solver_status="certified",
        solver_fell_back=False, classic_interleaved=classic, warnings=tuple(warnings),
        plan_fingerprint=plan.fingerprint, counts_fingerprint=counts.fingerprint,
        options={"bootstrap": bootstrap, "seed": 1}, package_version="0.1.0",
    )


@pytest.fixture(scope="module")
def one_qubit():
    plan = make_plan(n_qubits=1, lengths=[1, 2, 3, 6, 12], sequences=60, shots=200, seed=5)
    err = error_from_parts(1, [{"type": "rotation", "pauli": "Z", "angle": 0.1},
                               {"type": "amplitude_damping", "gamma": 0.02}])
    dev = Device.build(1, error=err, readout=[(0.02, 0.03)], prep_flip=[0.01])
    counts = simulate(plan, dev, seed=6)
    return plan, counts, err


@pytest.fixture(scope="module")
def rec1(one_qubit):
    plan, counts, err = one_qubit
    return make_reconstruction(plan=plan, counts=counts, error=err,
                               warnings=("<script>alert('w')</script> & more",))


@pytest.fixture(scope="module")
def rec2_interleaved():
    plan = make_plan(n_qubits=2, lengths=[1, 2, 3, 6], sequences=[60, 60, 40, 30], shots=100, seed=8,
                     interleave="cz")
    gate_err = error_from_parts(2, [{"type": "rotation", "pauli": "ZZ", "angle": 0.06},
                                    {"type": "amplitude_damping", "gamma": 0.02, "qubits": [1]}])
    dev = Device.build(2, error=depolarizing(2, 0.99), interleaved_error=gate_err,
                       readout=[(0.02, 0.03), (0.02, 0.025)])
    counts = simulate(plan, dev, seed=9)
    return make_reconstruction(plan=plan, counts=counts, error=gate_err, target=CZ, label="cz <&> \"gate\"",
                               bootstrap=5)


@pytest.fixture(scope="module")
def report1(rec1, one_qubit, tmp_path_factory):
    out = tmp_path_factory.mktemp("report1")
    return write_report(rec1, out, plan=one_qubit[0])


@pytest.fixture(scope="module")
def report2(rec2_interleaved, tmp_path_factory):
    return write_report(rec2_interleaved, tmp_path_factory.mktemp("report2") / "nested" / "dir")


# ---- JSON summary ---------------------------------------------------------------------------
def _strict_json(text: str):
    # RFC 8259 has no NaN or Infinity; Python's json would otherwise accept them silently.
    def reject(token):
        raise ValueError(f"non-standard JSON constant {token}")
    return json.loads(text, parse_constant=reject)


def test_summary_contract_keys_and_values(report1, rec1):
    doc = _strict_json(report1.summary.read_text(encoding="utf-8"))
    for key in SUMMARY_KEYS:
        assert key in doc, key
    assert doc["n_qubits"] == 1 and doc["target"] == "identity"
    for key in ("average_gate_fidelity", "entanglement_fidelity", "diamond_distance", "unitarity"):
        iv = getattr(rec1.figures, key)
        assert doc[key] == {"value": iv.value, "ci95": [iv.low, iv.high]}
    span = rec1.figures.diamond_distance_range
    assert doc["diamond_distance_range"] == [span.low, span.high]
    assert doc["spam_constant"] == rec1.decays.spam_constant
    assert np.array_equal(np.array(doc["ptm"]), rec1.error_channel.ptm)
    assert [e["probe"] for e in doc["decays"]] == list(rec1.decays.probes.labels)
    assert np.allclose([e["lambda"] for e in doc["decays"]], rec1.decays.lambdas, rtol=0, atol=0)
    assert np.allclose([e["stderr"] for e in doc["decays"]], rec1.decays.lambda_stderr, rtol=0, atol=0)
    assert set(doc["pauli_error_rates"]) == {"I", "X", "Y", "Z"}
    # Pauli probabilities of a trace-preserving channel sum to 1 (common practice)
    assert math.isclose(sum(doc["pauli_error_rates"].values()), 1.0, abs_tol=1e-12)
    gen = rates_from_channel(rec1.error_channel)
    assert doc["error_generator"]["hamiltonian"] == pytest.approx(gen.hamiltonian, abs=1e-15)
    assert doc["error_generator"]["stochastic"] == pytest.approx(gen.stochastic, abs=1e-15)
    assert isinstance(doc["diagnostics"], dict) and "reference_decay_fit" in doc["diagnostics"]
    assert doc["warnings"] == list(rec1.warnings)


def test_summary_writes_nan_as_null(rec1):
    import dataclasses

    figs = dataclasses.replace(rec1.figures, unitarity=Interval(0.9, float("nan"), float("nan")))
    doc = report_summary(dataclasses.replace(rec1, figures=figs))
    text = json.dumps(doc, allow_nan=False)  # raises on any NaN left in
    assert _strict_json(text)["unitarity"] == {"value": 0.9, "ci95": [None, None]}


def test_summary_rejects_other_types():
    with pytest.raises(TypeError, match="'rec' must be a Reconstruction"):
        report_summary({"n_qubits": 1})


# ---- predicted decays -----------------------------------------------------------------------
def test_predicted_lambdas_match_slow_reference_and_known_cases(rec1):
    dec = rec1.decays
    ch = rec1.error_channel
    fast = _predicted_lambdas(dec, ch)
    d2m1 = 3
    slow = [np.trace(dec.probes.unital_blocks[a].T @ ch.unital_block) / d2m1 for a in range(dec.probes.n_probes)]
    assert np.allclose(fast, slow, atol=1e-14)
    # The identity probe's decay of a depolarizing channel diag(1, p, p, p) is p ("Scalable and
    # robust randomized benchmarking of quantum processes", PRL 106, 180504 (2011)).
    ident = dec.probes.identity_index
    assert _predicted_lambdas(dec, depolarizing(1, 0.93))[ident] == pytest.approx(0.93, abs=1e-14)
    # A unitary probe A measured on the channel A itself: tr(B_A^T B_A)/3 = 1 (orthogonal block).
    probes = default_probes(1)
    for a in range(probes.n_probes):
        assert _predicted_lambdas(dec, Channel.from_ptm(probes.ptms[a]))[a] == pytest.approx(1.0, abs=1e-12)


# ---- HTML -----------------------------------------------------------------------------------
class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.scripts, self.links, self.text = [], 0, [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a)
        if tag == "script":
            self.scripts += 1
        if tag in ("link", "iframe", "object", "embed"):
            self.links.append(tag)

    def handle_data(self, data):
        self.text.append(data)


def test_html_is_self_contained_with_embedded_pngs(report1):
    page = report1.html.read_text(encoding="utf-8")
    p = _Collect()
    p.feed(page)
    assert p.scripts == 0 and p.links == []
    without_images = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", page)
    assert not re.search(r"(?i)(https?:)?//[a-z0-9]|url\(|@import", without_images)
    assert len(p.imgs) == len(FIGURE_NAMES)
    for img in p.imgs:
        assert img["src"].startswith("data:image/png;base64,")
        data = base64.b64decode(img["src"].split(",", 1)[1], validate=True)
        assert data.startswith(PNG_SIGNATURE)
        # the embedded figure is byte-identical to the PNG written beside the report
        assert data == (report1.directory / img["data-file"]).read_bytes()
    for f in report1.figures:
        assert f.read_bytes().startswith(PNG_SIGNATURE)


def test_html_contents(report1, rec1, one_qubit):
    page = report1.html.read_text(encoding="utf-8")
    for heading in ("Figures of merit", "Decays", "Pauli transfer matrices", "error generator",
                    "Models side by side", "Diagnostics", "Assumptions and cautions", "What was run",
                    "non-unital part"):
        assert heading.lower() in page.lower(), heading
    assert rec1.plan_fingerprint in page and rec1.counts_fingerprint in page
    assert f"{rec1.figures.average_gate_fidelity.value:.5f}" in page
    assert "leakage" in page and "Markovian" in page and "validation" in page
    assert f"<td class=\"fp\">{one_qubit[0].shots}</td>" in page


def test_user_strings_are_escaped(report1, report2):
    page1 = report1.html.read_text(encoding="utf-8")
    assert "<script>" not in page1
    assert "&lt;script&gt;alert(&#x27;w&#x27;)&lt;/script&gt; &amp; more" in page1
    assert "test range &lt;b&gt;" in page1
    page2 = report2.html.read_text(encoding="utf-8")
    assert "cz <&>" not in page2
    assert "cz &lt;&amp;&gt; &quot;gate&quot;" in page2


def test_interleaved_report(report2, rec2_interleaved):
    page = report2.html.read_text(encoding="utf-8")
    assert "interleaved run" in page and "classic interleaved error" in page
    doc = _strict_json(report2.summary.read_text(encoding="utf-8"))
    assert doc["mode"] == "interleaved" and doc["n_qubits"] == 2
    assert len(doc["decays"]) == 225 and len(doc["interleaved_decays"]) == 225
    assert np.allclose(np.array(doc["noisy_gate_ptm"]), rec2_interleaved.noisy_gate.ptm, atol=0)
    assert len(doc["nonunital_ranges"]) == 15


def test_no_overwrite_without_force(report1, rec1, one_qubit):
    before = {p: p.read_bytes() for p in report1.directory.iterdir()}
    with pytest.raises(FileExistsError, match="output exists"):
        write_report(rec1, report1.directory)
    assert {p: p.read_bytes() for p in report1.directory.iterdir()} == before
    again = write_report(rec1, report1.directory, force=True, plan=one_qubit[0])
    assert again.html.read_bytes() == before[report1.html]  # deterministic output


def test_plan_must_match(rec1, tmp_path):
    other = make_plan(n_qubits=1, lengths=[1, 2], sequences=3, seed=99)
    with pytest.raises(ValueError, match="'plan' does not match"):
        write_report(rec1, tmp_path, plan=other)
    assert list(tmp_path.iterdir()) == []


def test_summary_table_text(rec1, rec2_interleaved):
    text = summary_table(rec1)
    assert "average gate fidelity" in text and "95% interval" in text
    iv = rec1.figures.average_gate_fidelity
    assert f"[{iv.low:.5f}, {iv.high:.5f}]" in text
    assert "classic interleaved" in summary_table(rec2_interleaved)


def test_range_bound_shows_the_largest_attained_value(rec1):
    import dataclasses

    from robusttomo.assess import DiamondSpan

    bound = DiamondSpan(0.01, 1.0, True, "test", attained_max=0.1436, certified_max=1.0)
    rec = dataclasses.replace(rec1, figures=dataclasses.replace(rec1.figures, diamond_distance_range=bound))
    line = [x for x in summary_table(rec).splitlines() if x.startswith("diamond distance range")][0]
    assert "[0.01000, 1.00000]" in line and "upper end bound; largest attained 0.14360" in line
    attained = DiamondSpan(0.01, 0.2, False, "test", attained_max=0.2)
    rec = dataclasses.replace(rec1, figures=dataclasses.replace(rec1.figures, diamond_distance_range=attained))
    line = [x for x in summary_table(rec).splitlines() if x.startswith("diamond distance range")][0]
    assert "upper end attained;" in line and "largest attained" not in line


# ---- rendering in a real browser --------------------------------------------------------------
_PROBE = """<script>
window.__rt = {errors: []};
window.addEventListener('error', function (e) {
  window.__rt.errors.push('error: ' + (e.message || (e.target && (e.target.src || e.target.tagName)) || '?'));
}, true);
(function () {
  var orig = console.error;
  console.error = function () { window.__rt.errors.push('console: ' + Array.from(arguments).join(' ')); orig.apply(console, arguments); };
})();
window.addEventListener('load', function () {
  var imgs = Array.from(document.images);
  var ok = imgs.filter(function (i) { return i.complete && i.naturalWidth > 0 && i.naturalHeight > 0; }).length;
  var out = document.createElement('pre');
  out.id = 'rt-probe';
  out.textContent = JSON.stringify({images: imgs.length, loaded: ok, errors: window.__rt.errors,
                                    height: document.body.scrollHeight});
  document.body.appendChild(out);
});
</script>"""


def _browser() -> str | None:
    for name in ("/usr/bin/chromium", "chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _render(browser: str, page: Path, work: Path, *, screenshot: Path | None = None) -> tuple[dict, str]:
    """Open a copy of ``page`` with the probe script injected; return the probe's record and the log."""
    html_text = page.read_text(encoding="utf-8")
    # The report's own policy forbids scripts; the probe copy relaxes it to inline scripts only.
    html_text = html_text.replace("default-src 'none';", "default-src 'none'; script-src 'unsafe-inline';")
    probed = work / "probed.html"
    probed.write_text(html_text.replace("<head>", "<head>" + _PROBE, 1), encoding="utf-8")
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-extensions",
             "--disable-default-apps", "--enable-logging=stderr", "--v=0",
             f"--user-data-dir={work / 'profile'}", "--virtual-time-budget=5000",
             "--proxy-server=127.0.0.1:9", "--proxy-bypass-list=<-loopback>"]
    env = {**os.environ, "HOME": str(work)}
    dom = subprocess.run([browser, *flags, "--dump-dom", probed.as_uri()], capture_output=True, text=True,
                         timeout=120, env=env)
    match = re.search(r'<pre id="rt-probe">(.*?)</pre>', dom.stdout, re.S)
    assert match, f"the probe did not run; browser stderr: {dom.stderr[-2000:]}"
    record = json.loads(match.group(1).replace("&quot;", '"').replace("&amp;", "&").replace("&lt;", "<")
                        .replace("&gt;", ">"))
    if screenshot is not None:
        subprocess.run([browser, *flags, f"--screenshot={screenshot}", "--window-size=1280,6000",
                        "--hide-scrollbars", page.as_uri()], capture_output=True, timeout=120, env=env)
    return record, dom.stderr


def _console_errors(log: str) -> list[str]:
    return [line for line in log.splitlines() if "CONSOLE" in line and ("ERROR" in line or "error" in line.lower())]


@pytest.mark.skipif(_browser() is None, reason="no headless browser installed (Debian package 'chromium'; "
                                                ".ci/run installs it)")
def test_report_renders_in_headless_chromium(report2, tmp_path):
    browser = _browser()
    shot = tmp_path / "report.png"
    record, log = _render(browser, report2.html, tmp_path, screenshot=shot)
    assert record["images"] == len(FIGURE_NAMES)
    assert record["loaded"] == record["images"], record
    assert record["errors"] == [], record
    assert _console_errors(log) == []
    assert record["height"] > 1500  # the page laid out its sections
    assert shot.is_file() and shot.read_bytes().startswith(PNG_SIGNATURE)
    keep = os.environ.get("ROBUSTTOMO_SCREENSHOT_DIR")
    if keep:
        shutil.copy(shot, Path(keep) / "report-screenshot.png")


@pytest.mark.skipif(_browser() is None, reason="no headless browser installed (Debian package 'chromium')")
def test_browser_check_detects_a_broken_image(report2, tmp_path):
    # Negative control: the same check must fail on a page with a corrupt embedded image.
    page = report2.html.read_text(encoding="utf-8")
    broken = tmp_path / "broken.html"
    broken.write_text(page.replace("data:image/png;base64,", "data:image/png;base64,AAAA", 1), encoding="utf-8")
    record, _ = _render(_browser(), broken, tmp_path)
    assert record["images"] == len(FIGURE_NAMES)
    assert record["loaded"] == record["images"] - 1
    assert any("error" in e for e in record["errors"])
