# ruff: noqa: E501  (the HTML template is kept readable as one string)
"""Self-contained HTML report of a check (inline CSS, every user string escaped).

Rendered with jinja2 and ``autoescape=True``: file names, column names and notes come
from the user and are escaped. The report states that the thresholds are common
practice, not a published standard, and that the audit checks numerical agreement with
the exact model, not whether the model suits the data (DESIGN sections 7 and 9).
"""

from __future__ import annotations

import math
from typing import Any

import jinja2

from harness.audit.verdict import COMMON_PRACTICE
from harness.check.check_records import CheckResult

_TEMPLATE = """<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>covaudit check: {{ r.source }}</title>
<style>
body{font-family:system-ui,sans-serif;max-width:70rem;margin:2rem auto;padding:0 1rem;color:#222}
table{border-collapse:collapse;margin:1rem 0}td,th{border:1px solid #bbb;padding:.25rem .5rem;
text-align:right}th{background:#eee}td.l,th.l{text-align:left}.ok{background:#dfd}
.bad{background:#fdd}.info{color:#555}.box{border:1px solid #999;padding:.5rem 1rem;background:#f8f8f8}
@media print{body{margin:0}}
</style></head><body>
<h1>covaudit check</h1>
<p><b>Data:</b> {{ r.source }} &mdash; {{ r.n }} points ({{ r.n_fit }} fitted, {{ r.n_holdout }}
held out), {{ r.d }}D, coordinates {{ r.coord_system }}. <b>Model:</b> {{ r.kernel }} kernel,
{{ r.mean }} mean. <b>Reference:</b> {{ r.reference }}.</p>
<p><b>Solver under test:</b> {{ r.solver.get("name", "") }}{% if r.solver.get("version") %} {{ r.solver.get("version") }}{% endif %}{% if r.solver.get("origin") %} ({{ r.solver.get("origin") }}){% endif %}, {{ r.solver_seeds | length }} seed(s) of its randomness per tolerance; the worst seed decides.</p>
{% for w in r.warnings %}<div class="box bad"><b>Warning:</b> {{ w }}</div>{% endfor %}
<div class="box"><b>Recommendation:</b>
{% if r.recommended_tolerance is not none %}tolerance {{ fmt(r.recommended_tolerance) }}
(loosest safe tolerance; log-likelihood {{ fmt(r.speedup) }}x faster than {{ r.speedup_over }}).
{% else %}no tolerance in the list is safe for these data.{% endif %}</div>
<h2>Fitted parameters</h2>
<table><tr><th class="l">parameter</th><th>estimate</th><th>SE</th>{% if truth %}<th>truth</th>{% endif %}</tr>
{% for name, value in params %}<tr><td class="l">{{ name }}</td><td>{{ fmt(value) }}</td>
<td>{{ fmt(se.get(name)) }}</td>{% if truth %}<td>{{ fmt(truth.get(name)) }}</td>{% endif %}</tr>{% endfor %}
{% if r.se.microergodic is not none %}<tr><td class="l">s2 / l^(2 nu) (microergodic)</td>
<td>{{ fmt(r.se.microergodic) }}</td><td>{{ fmt(r.se.microergodic_se) }}</td>{% if truth %}<td>{{ fmt(truth.get("microergodic")) }}</td>{% endif %}</tr>{% endif %}
</table>
<p>Maximized log-likelihood {{ fmt(r.loglik) }} ({{ r.fit.get("method") }}{% if r.fit.get("engine") %}, {{ r.fit.get("engine") }}{% endif %}).</p>
<h2>Verdict per tolerance</h2>
<table><tr><th>tol</th><th class="l">verdict</th>{% for m in metric_names %}<th>{{ m }}{% if limits.get(m) is not none %}<br><span class="info">&le; {{ fmt(limits[m]) }}</span>{% endif %}</th>{% endfor %}<th>seconds</th><th>speed-up</th></tr>
{% for t in r.tolerances %}<tr class="{{ 'ok' if t.safe else 'bad' }}"><td>{{ fmt(t.tol) }}</td>
<td class="l">{{ t.status or ('safe' if t.safe else 'unsafe') }}</td>
{% if t.error %}<td class="l" colspan="{{ metric_names | length + 2 }}">{{ t.error }}</td>
{% else %}{% for m in metric_names %}{% set v = t.metric(m) %}<td>{% if v %}{{ fmt(v.value) }}{% if v.uncertainty %} &plusmn; {{ fmt(v.uncertainty) }}{% endif %}{% endif %}</td>{% endfor %}
<td>{{ fmt(t.seconds) }}</td><td>{{ fmt(t.speedup) }}</td>{% endif %}</tr>{% endfor %}</table>
<h2>Spread over the solver's seeds</h2>
<table><tr><th>tol</th><th class="l">metric</th><th>min</th><th>median</th><th>max</th><th>seeds</th></tr>
{% for t in r.tolerances %}{% for name, sp in t.spread.items() %}<tr><td>{{ fmt(t.tol) }}</td><td class="l">{{ name }}</td><td>{{ fmt(sp.get("min")) }}</td><td>{{ fmt(sp.get("median")) }}</td><td>{{ fmt(sp.get("max")) }}</td><td>{{ sp.get("seeds") }}</td></tr>{% endfor %}{% endfor %}</table>
<h3>Reasons</h3><ul>{% for t in r.tolerances %}<li>{{ fmt(t.tol) }}: {{ t.status }} &mdash; {{ t.reasons | join("; ") }}</li>{% endfor %}</ul>
{% if r.refit %}<h2>End-to-end refit at tol {{ fmt(r.refit.tol) }}</h2>
<p>Largest parameter shift {{ fmt(r.refit.max_shift_se) }} SE; change of the maximized
log-likelihood {{ fmt(r.refit.loglik_change) }} nat ({{ r.refit.evaluations }} evaluations, {{ r.refit.accepted_steps }} step(s) accepted). {{ r.refit.note }}</p>{% endif %}
<h2>Held-out kriging (reference model)</h2>
<p>{{ r.holdout.get("points") }} points: RMSE {{ fmt(r.holdout.get("rmse")) }}, mean squared
z-score {{ fmt(r.holdout.get("mean_z2")) }}, 95% interval coverage {{ fmt(r.holdout.get("coverage95")) }}.</p>
<h2>Notes</h2><ul>{% for note in r.notes %}<li>{{ note }}</li>{% endfor %}
<li>Thresholds: {{ practice }}.</li>
<li>MLOE and MMOM follow Hong, Abdulah, Genton and Sun (2021, Spatial Statistics 43), with definitions written from memory (see the documentation).</li>
<li>This audit checks numerical agreement with the exact model, not whether the model suits
the data. Where results feed decisions about health, safety or the environment, follow local
regulations and licensed professional practice.</li></ul>
</body></html>
"""


def _fmt(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, list):
        return ", ".join(_fmt(v) for v in value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        return f"{value:.4g}"
    return str(value)


def _flat(params: dict[str, Any]) -> dict[str, Any]:
    return dict(params)


def render_check_report(result: CheckResult) -> str:
    """The HTML text of the report."""
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined)
    template = env.from_string(_TEMPLATE)
    names: list[str] = []
    limits: dict[str, float | None] = {}
    for row in result.tolerances:
        for m in row.metrics:
            if m.name not in names:
                names.append(m.name)
                limits[m.name] = m.threshold
    truth = None
    if result.truth:
        truth = _flat(result.truth)
    return template.render(r=result, fmt=_fmt, params=list(result.params.items()),
                           se=result.se.get("natural", {}), truth=truth,
                           metric_names=names, limits=limits, practice=COMMON_PRACTICE)
