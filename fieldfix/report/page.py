"""The page: four questions answered at a glance, then one section per question.

A physicist opening a distortion report asks, in this order: is the field plausible? did
the correction help where voxels moved? where will signal be lost? is anything
suspicious? The page opens with one tile per question (its answer in numbers, coloured
by what the checks found), then a section per question in the same order, then the figure
for papers and the methods. The template (``templates/page.html.j2``, with
``page.css`` and ``crosshair.js``) is package data rendered by jinja2 with autoescaping on,
so no text from a dataset is ever read as HTML; the page's Content-Security-Policy allows
only its own style sheet and script, by their SHA-256 hashes, and images from ``data:``.

Examples
--------
>>> policy = content_security_policy("body{}", "1;")
>>> "'unsafe-inline'" in policy, policy.startswith("default-src 'none'")
(False, True)
"""

from __future__ import annotations

import base64
import hashlib
import json
from importlib import resources

from .checks import RULES
from .view import Num, Text, dropout_facts, field_map_facts, lookup, num, plan_facts, plan_table, run_facts

__all__ = ["render_page", "content_security_policy", "asset", "EDGE_METHOD"]

EDGE_METHOD = ("Edge agreement: normalised gradient fields (Haber and Modersitzki 2006, MICCAI) of the EPI volume "
               "and the field-map magnitude resampled onto the EPI grid, each voxel weighted by the squared cosine "
               "between the magnitude's edge normal and the phase-encode axis (B0 distortion can only move those "
               "edges; weighting and normalisation ours); 0 = edges perpendicular or absent, 1 = all parallel. "
               "'Where voxels moved' is the region displaced by more than 1 voxel together with the paths to where "
               "its signal lay before correction.")


def asset(name: str) -> str:
    """A file of the page's package data (template, style sheet, script) as text."""
    return resources.files("fieldfix.report").joinpath("templates", name).read_text(encoding="utf-8")


def _sha256(text: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(text.encode("utf-8")).digest()).decode("ascii") + "'"


def content_security_policy(css: str, script: str) -> str:
    """No outside source at all; only fieldfix's own inline style sheet and script, by hash."""
    return (f"default-src 'none'; img-src data:; style-src {_sha256(css)}; script-src {_sha256(script)}; "
            "base-uri 'none'; form-action 'none'")


def _tile(**fields) -> dict:
    tile = {"state": "none", "lines": [], "empty": None, "more": 0, "item": None, "count": 0, "first": [], **fields}
    tile.setdefault("linked", tile["empty"] is None)
    return tile


def _state(measure) -> str:
    if measure is None or measure["change"] is None:
        return "none"
    change = measure["change"] if measure["higher_is_better"] else -measure["change"]
    return "ok" if change > 0.01 else ("bad" if change < -0.01 else "look")


def _field_tile(data) -> dict:
    fms = data["field_maps"]
    if not fms:
        return _tile(empty="no field map in this report")
    beyond = fms[0]["percent_mask_beyond_unaliased_range"]
    lines = [("1st to 99th percentile", [num(data, "field_maps.0.field_percentiles_hz.p1", "{:+.1f}", "Hz"),
                                         num(data, "field_maps.0.field_percentiles_hz.p99", "{:+.1f}", "Hz")])]
    if fms[0]["unaliased_range_hz"] is not None:
        lines.append(("beyond the unaliased range",
                      [num(data, "field_maps.0.percent_mask_beyond_unaliased_range", "{:.2f}", "% of mask")]))
    for j, m in enumerate(data["headline"]):
        if m["kind"] == "truth_b0_error":
            lines.append((f"{m['label']} ({m['region']})", [num(data, f"headline.{j}.after", "{:.2f}", m["unit"])]))
    coverage = fms[0]["mask_coverage"]
    look = bool(beyond) or (coverage is not None and coverage < 0.7)
    return _tile(state="look" if look else "ok", lines=lines, more=len(fms) - 1)


def _correction_tile(data) -> dict:
    measures = list(enumerate(data["headline"]))
    first = next(((i, m) for i, m in measures if m["kind"] in ("edges_moved", "polarities")), None)
    if not data["runs"]:
        return _tile(empty="no unwarped run in this report")
    if first is None:
        return _tile(empty="no anatomy reference: edge agreement not measured", linked=True)
    i, m = first
    lines = [(m["label"], [num(data, f"headline.{i}.before", "{:.3f}", m["unit"]),
                           num(data, f"headline.{i}.after", "{:.3f}", m["unit"]),
                           num(data, f"headline.{i}.change", "{:+.3f}", m["unit"])])]
    for j, other in measures:
        if other["item"] == m["item"] and other["kind"] in ("edges_whole", "truth_edges_moved"):
            lines.append((other["label"], [num(data, f"headline.{j}.before", "{:.3f}", other["unit"]),
                                           num(data, f"headline.{j}.after", "{:.3f}", other["unit"])]))
        elif other["item"] == m["item"] and other["kind"] == "truth_shift_error":
            lines.append((f"{other['label']} ({other['region']})",
                          [num(data, f"headline.{j}.after", "{:.2f}", other["unit"])]))
    return _tile(state=_state(m), lines=lines, more=len(data["runs"]) - 1, item=m["item"])


def _loss_tile(data) -> dict:
    lines = []
    if data["dropout"]:
        drop = data["dropout"][0]
        lines.append((f"under {drop['parameters']['threshold']:g} of the signal, inside {drop['mask']}",
                      [num(data, "dropout.0.retention.percent_below_threshold", "{:.1f}", "% of mask")]))
        lines.append(("for", [num(data, "dropout.0.parameters.te_s", "TE {:.1f}", "ms", 1000.0),
                              num(data, "dropout.0.parameters.thickness_mm", "{:g}", "mm slices"),
                              num(data, "dropout.0.parameters.tilt_deg", "tilt {:g}", "\u00b0")]))
    if data["plans"]:
        lines.append(("recommended protocol", [Text(data["plans"][0]["recommended"]["protocol"])]))
    if not lines:
        return _tile(empty="no dropout prediction or plan in this report")
    return _tile(state="info", lines=lines, more=max(len(data["dropout"]) - 1, 0))


def _suspicious_tile(data) -> dict:
    warnings = data["warnings"]
    state = "bad" if any(w["code"] == "edges_worse" for w in warnings) else ("look" if warnings else "ok")
    return _tile(state=state, count=len(warnings),
                 first=[f"{w['where']}: {w['message']}" for w in warnings[:2]])


def _overview(data) -> list[list[object]]:
    rows = []
    for i, run in enumerate(data["runs"]):
        rows.append([Text(run["subject"] or "\u2013"), Text(run["stem"]),
                     num(data, f"runs.{i}.edge_agreement_shifted_before", "{:.3f}", "NGF, 0\u20131"),
                     num(data, f"runs.{i}.edge_agreement_shifted_after", "{:.3f}", "NGF, 0\u20131"),
                     num(data, f"runs.{i}.edge_agreement_before", "{:.3f}", "NGF, 0\u20131"),
                     num(data, f"runs.{i}.edge_agreement_after", "{:.3f}", "NGF, 0\u20131"),
                     num(data, f"runs.{i}.max_abs_shift_mm", "{:.1f}", "mm"),
                     num(data, f"runs.{i}.folded_voxels", "{:d}", "voxels")])
    return rows


def _sections(data, pictures) -> dict:
    field_maps = [{"data": fm, "facts": field_map_facts(data, i), "grid": pictures.field_grids[i],
                   "histogram": pictures.histograms[i]} for i, fm in enumerate(data["field_maps"])]
    runs = []
    for i, run in enumerate(data["runs"]):
        measures = [(j, m) for j, m in enumerate(data["headline"]) if m["item"] == run["stem"]]
        headline = [(m["label"], m["region"], num(data, f"headline.{j}.before", "{:.3f}", m["unit"]),
                     num(data, f"headline.{j}.after", "{:.3f}", m["unit"]),
                     num(data, f"headline.{j}.change", "{:+.3f}", m["unit"]), _state(m)) for j, m in measures]
        runs.append({"data": run, "headline": headline, "groups": run_facts(data, i),
                     "grid": pictures.run_grids[i], "profile": pictures.profiles[i]})
    dropout = []
    for i, drop in enumerate(data["dropout"]):
        protocol, stats = dropout_facts(data, i)
        q = f"dropout.{i}.parameters"
        headline = [num(data, f"{q}.te_s", "TE {:.1f}", "ms", 1000.0),
                    num(data, f"{q}.thickness_mm", "{:g}", "mm slices"), num(data, f"{q}.tilt_deg", "tilt {:g}", "\u00b0")]
        dropout.append({"data": drop, "headline": headline, "protocol": protocol, "stats": stats,
                        "grid": pictures.dropout_grids[i]})
    plans = [{"data": plan, "facts": plan_facts(data, i), "table": plan_table(data, i),
              "picture": pictures.plans[i]} for i, plan in enumerate(data["plans"])]
    return {"field_maps": field_maps, "runs": runs, "dropout": dropout, "plans": plans}


def _notes(data) -> list[str]:
    notes = list(data["notes"])
    for kind in ("field_maps", "runs", "dropout"):
        for item in data[kind]:
            notes += [f"{item['name']}: {n}" for n in item["notes"]]
    return notes


def render_page(data: dict, pictures) -> str:
    """The page for the report JSON `data` (:meth:`ReportSummary.to_json`) and its pictures."""
    import jinja2

    css, script = asset("page.css"), asset("crosshair.js")
    env = jinja2.Environment(autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True,
                             lstrip_blocks=True)
    env.filters["data_uri"] = lambda png: "data:image/png;base64," + base64.b64encode(png).decode("ascii")
    env.filters["tojson_attr"] = lambda value: json.dumps(value, separators=(",", ":"))
    env.tests["num"] = lambda cell: isinstance(cell, Num)
    template = env.from_string(asset("page.html.j2"))
    uses_edges = any(r["edge_agreement_after"] is not None for r in data["runs"])
    return template.render(
        data=data, css=css, script=script, csp=content_security_policy(css, script),
        tiles={"field": _field_tile(data), "correction": _correction_tile(data), "loss": _loss_tile(data),
               "suspicious": _suspicious_tile(data)},
        overview=_overview(data) if len(data["runs"]) > 1 else [], sections=_sections(data, pictures),
        pictures=pictures, notes=_notes(data), rules=RULES, methods=[EDGE_METHOD] if uses_edges else [],
        lookup=lookup)
