"""The pre-lab sheet: every step's predictions with bands, cautions and diagram, for a bench and template.

No session is needed: the sheet is what a group studies before the lab. It is
built from the same templates and predictions the session uses, so the numbers
on the sheet are the numbers the verdicts are judged against (same seed and
sample count).
"""

from __future__ import annotations

import hashlib

from labkit import __version__
from labkit.core.bench import Bench
from labkit.core.cautions import DEFER, step_cautions
from labkit.core.diagram import bench_diagram
from labkit.core.predict import DEFAULT_SAMPLES, DEFAULT_SEED, predict_template
from labkit.core.quantities import quantity
from labkit.core.template import SessionTemplate
from labkit.report.common import Progress, no_progress
from labkit.report.html import esc, markdown, page, table
from labkit.report.session import Report, _phasors, _state_words
from labkit.report.svg import diagram_svg, phasor_svg


def prelab_sheet(bench: Bench, template: SessionTemplate, *, n_samples: int = DEFAULT_SAMPLES,
                 seed: int = DEFAULT_SEED, bench_text: str = "", template_text: str = "",
                 progress: Progress = no_progress) -> Report:
    """Render the pre-lab sheet of a template on a bench.

    Parameters
    ----------
    bench, template
        Validated bench (with its cart, if any) and template.
    n_samples, seed
        Monte Carlo samples and seed of the tolerance bands.
    bench_text, template_text
        The files' texts, to print their SHA-256 (optional).
    progress
        ``progress(done, total, what)``.
    """
    total = len(template.steps) + 1
    progress(0, total, "predicting the steps")
    steps = predict_template(bench, template, n_samples=n_samples, seed=seed)
    head = template.template
    body = [f"<h1>{esc(head.title)} \u2014 pre-lab sheet</h1>",
            table(["", ""], [("template", f"{head.id} v{head.version}"),
                             ("bench", f"{bench.bench.title} [{bench.bench.id} v{bench.bench.version}]"),
                             ("cart", bench.cart.id if bench.cart else "(bench type values)"),
                             ("bands", f"5-95 % of {n_samples} Monte Carlo samples, seed {seed}")], cls="meta")]
    if head.scenario:
        body.append(markdown(head.scenario))
    if head.objectives:
        body.append("<h2>Objectives</h2><ul>" + "".join(f"<li>{markdown(o)}</li>" for o in head.objectives)
                    + "</ul>")
    body.append("<h2>Cautions</h2>" + "".join(f'<div class="caution">{esc(c)}</div>' for c in head.cautions)
                + f'<p class="defer">{esc(DEFER)}</p>')
    for k, (step, sp) in enumerate(zip(template.steps, steps, strict=True)):
        progress(k + 1, total, f"step {step.id}")
        pred = sp.prediction
        part = [f'<section class="step"><h2>Step {k + 1}: {esc(step.title)} '
                f'<span class="muted">[{esc(step.id)}, {esc(step.kind)}]</span></h2>', markdown(step.instructions)]
        part += [f'<div class="caution">{esc(c)}</div>'
                 for c in step_cautions(bench, step, sp.state, pred.rating_flags if pred else None)]
        sensors = {r.sensor: r.location for r in step.readings if r.sensor}
        part.append(f"<figure>{diagram_svg(bench_diagram(bench, sp.state, sensors=sensors))}<figcaption>"
                    f"{esc('; '.join(_state_words(bench, sp.state)))}</figcaption></figure>")
        if pred is None:
            part.append(f'<p class="flag">This configuration cannot be predicted: {esc(sp.error)}</p>')
        else:
            part += [f'<p class="flag">Warning: {esc(w)}</p>' for w in pred.warnings]
            rows = []
            for spec in step.readings:
                try:
                    value, low, high = pred.reading(spec.location, spec.quantity, spec.sensor)
                    rows.append([spec.location, spec.quantity, quantity(spec.quantity).unit, value, low, high,
                                 spec.tolerance, spec.sensor or "", spec.note])
                except KeyError:
                    rows.append([spec.location, spec.quantity, spec.unit, "no prediction", "", "", spec.tolerance,
                                 spec.sensor or "", spec.note])
            part.append(table(["location", "quantity", "unit", "predicted", "band low", "band high", "tolerance",
                               "sensor", "note"], rows,
                              numeric=[False, False, False, True, True, True, False, False, False])
                        if rows else '<p class="muted">No readings in this step.</p>')
            currents = [r.location for r in step.readings if "@" in r.location]
            part.append("<figure>" + phasor_svg(_phasors(pred, currents), title=f"phasors, step {step.id}")
                        + "<figcaption>Predicted phasors (nominal).</figcaption></figure>")
        part.append("</section>")
        body.append("".join(part))
    prov = [("bench", f"{bench.bench.id} v{bench.bench.version}"),
            ("template", f"{head.id} v{head.version}"), ("made with", f"labkit {__version__}")]
    if bench_text:
        prov.append(("bench SHA-256", hashlib.sha256(bench_text.encode()).hexdigest()))
    if template_text:
        prov.append(("template SHA-256", hashlib.sha256(template_text.encode()).hexdigest()))
    body.append("<h2>Provenance</h2>" + table(["", ""], prov, cls="meta"))
    progress(total, total, "done")
    frames = {}
    from labkit.core.tables import template_frame

    frames["predictions"] = template_frame(steps)
    title = f"{head.title} \u2014 pre-lab sheet"
    return Report(page(title, "".join(body), data={"kind": "labkit-prelab", "template": head.id,
                                                    "template_version": head.version,
                                                    "labkit_version": __version__}), frames, title)

