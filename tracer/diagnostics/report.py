"""The HTML report of `tracer compare`: one self-contained file that opens from disk in a browser.

Every image (display renders, shared-scale heat maps, ratio map, cost plot) is embedded as a base64
`data:` URI (RFC 2397), so the report can be moved or mailed alone. It shows the statistics table, a
short explanation generated from the statistics, and a plot of predicted against measured cost.

Predicted cost is the SAH cost of the built structure (MacDonald & Booth 1990, "Heuristics for ray
tracing using space subdivision", The Visual Computer 6(3), 153-166; constants in the build statistics):
the expected node visits plus triangle tests of a ray that meets the root box, for rays spread
uniformly over lines (the geometric-probability argument of that paper). Measured cost is the mean
nodes visited and triangles tested per ray of the render. They differ because real rays are not
uniform lines, shadow rays stop at the first hit and closest-hit rays stop early.
"""
import base64
import html
import io
from pathlib import Path

import numpy as np

from tracer.io.atomic import atomic_open

# Above this spread of values (max / min) the cost plot uses logarithmic axes: brute force tests every
# triangle and would squash the structures into one corner of linear axes.
LOG_AXES_SPREAD = 30.0
# A render with fewer rays than this is too short for a stable rays-per-second figure.
STABLE_TIMING_RAYS = 1_000_000
# Relative difference below which two measured figures count as even.
EVEN_WITHIN = 0.02

STYLE = """
body { font-family: system-ui, sans-serif; margin: 1.5em; color: #222; max-width: 1400px; }
h1 { font-size: 1.4em; } h2 { font-size: 1.15em; margin-top: 1.6em; }
table { border-collapse: collapse; font-size: 0.85em; }
th, td { border: 1px solid #bbb; padding: 0.25em 0.5em; text-align: right; }
th:first-child, td:first-child { text-align: left; }
th { background: #eee; }
figure { display: inline-block; margin: 0.5em 1em 0.5em 0; vertical-align: top; }
figcaption { font-size: 0.85em; text-align: center; }
img.render { min-width: 240px; image-rendering: pixelated; }
img.wide { max-width: 100%; }
p.why { max-width: 60em; line-height: 1.45; }
.note { color: #666; font-size: 0.85em; }
"""


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _file_uri(path) -> str | None:
    path = Path(path) if path is not None else None
    if path is None or not path.is_file():
        return None
    return _data_uri(path.read_bytes())


def _get(stats: dict, *keys, default=None):
    for key in keys:
        if not isinstance(stats, dict) or key not in stats:
            return default
        stats = stats[key]
    return stats


def measured_costs(stats: dict) -> tuple[float, float]:
    """(mean nodes per ray, mean triangles per ray) of a render's statistics."""
    return (float(_get(stats, "cost", "nodes_per_ray", "mean", default=0.0)),
            float(_get(stats, "cost", "tris_per_ray", "mean", default=0.0)))


def cost_plot_png(results: dict) -> bytes:
    """PNG of predicted (SAH) cost against measured nodes, triangles and their sum per ray, per SPEC."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg  # on first use: slow to import
    from matplotlib.figure import Figure
    specs = list(results)
    predicted = np.array([float(_get(results[s], "build", "sah_cost", default=np.nan)) for s in specs])
    nodes, tris = (np.array(column) for column in zip(*(measured_costs(results[s]) for s in specs),
                                                          strict=True))
    total = nodes + tris
    every = np.concatenate([predicted, nodes, tris, total])
    positive = every[np.isfinite(every) & (every > 0)]
    log_axes = positive.size > 0 and positive.max() / positive.min() > LOG_AXES_SPREAD
    fig = Figure(figsize=(6.4, 4.6), dpi=100)
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    series = (("nodes per ray", nodes, "o"), ("triangles per ray", tris, "s"),
              ("nodes + triangles per ray", total, "^"))
    for label, measured, marker in series:
        keep = np.isfinite(predicted) & np.isfinite(measured)
        if log_axes:
            keep &= (predicted > 0) & (measured > 0)   # zero has no place on a log axis (brute: no nodes)
        ax.scatter(predicted[keep], measured[keep], marker=marker, label=label, s=40)
    for spec, x, y in zip(specs, predicted, total, strict=True):
        if np.isfinite(x) and np.isfinite(y) and (not log_axes or (x > 0 and y > 0)):
            ax.annotate(spec, (x, y), textcoords="offset points", xytext=(6, 4), fontsize=8)
    if positive.size:
        low, high = (positive.min() * 0.7, positive.max() * 1.4) if log_axes else (0.0, positive.max() * 1.1)
        ax.plot([low, high], [low, high], linestyle="--", color="grey", linewidth=1,
                label="measured = predicted")
    if log_axes:
        ax.set_xscale("log")
        ax.set_yscale("log")
    ax.set_xlabel("predicted: SAH cost (node visits + triangle tests per ray meeting the root)")
    ax.set_ylabel("measured: mean per ray (all rays)")
    ax.set_title("Predicted against measured cost", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=100)
    return buffer.getvalue()


def _order(values: dict) -> list[str]:
    return sorted(values, key=lambda spec: values[spec])


def _percent(x: float) -> str:
    return f"{100.0 * x:.1f}%"


def explain(results: dict, ratio: dict | None = None) -> list[str]:
    """Sentences that say, from the statistics alone, which structure did best and why."""
    sentences = []
    speed = {s: float(_get(r, "render", "mrays_per_s", default=0.0)) for s, r in results.items()}
    ranked = sorted(speed, key=lambda s: -speed[s])
    if len(ranked) >= 2 and speed[ranked[-1]] > 0:
        fast, slow = ranked[0], ranked[-1]
        sentences.append(f"{fast} traced fastest at {speed[fast]:.3g} Mrays/s, "
                         f"{speed[fast] / speed[slow]:.2f}x the slowest, {slow} ({speed[slow]:.3g} Mrays/s).")
    rays = min(int(_get(r, "render", "rays_total", default=0)) for r in results.values())
    if rays < STABLE_TIMING_RAYS:
        sentences.append(f"With {rays:,} rays per render the timings are noisy; the per-ray counts below are "
                         f"exact and decide the comparison.")
    measured = {s: measured_costs(r) for s, r in results.items()}
    with_nodes = {s: m[0] for s, m in measured.items() if _get(results[s], "build", "nodes", default=0) > 0}
    if len(with_nodes) >= 2:
        order = _order(with_nodes)
        sentences.append(f"{order[0]} visited the fewest nodes per ray ({with_nodes[order[0]]:.2f}), "
                         f"{order[-1]} the most ({with_nodes[order[-1]]:.2f}).")
    tris = {s: m[1] for s, m in measured.items()}
    order = _order(tris)
    sentences.append(f"{order[0]} tested the fewest triangles per ray ({tris[order[0]]:.2f}), "
                     f"{order[-1]} the most ({tris[order[-1]]:.2f}).")
    for spec, stats in results.items():
        if _get(stats, "build", "kind") == "brute" or spec.startswith("brute"):
            triangles = int(stats.get("triangles", 0))
            sentences.append(f"{spec} has no structure: every ray tests all {triangles:,} triangles (shadow "
                             f"rays stop at the first blocker), so it only sets the baseline.")
    sah = {s: float(_get(r, "build", "sah_cost", default=np.nan)) for s, r in results.items()}
    sah = {s: v for s, v in sah.items() if np.isfinite(v)}
    if len(sah) >= 2:
        predicted_order = _order(sah)
        total = {s: sum(measured[s]) for s in sah}
        measured_order = _order(total)
        verdict = ("agrees with" if predicted_order == measured_order else "differs from")
        sentences.append(f"By SAH cost (predicted) the order from cheapest is {', '.join(predicted_order)}; "
                         f"the measured nodes + triangles per ray give {', '.join(measured_order)}, which "
                         f"{verdict} the prediction"
                         + ("." if verdict == "agrees with" else
                            ": the SAH assumes rays spread uniformly over lines through the root box, but "
                            "camera and bounce rays are not, and rays stop early once they hit."))
    refs = {s: float(_get(r, "build", "references_per_triangle", default=np.nan)) for s, r in results.items()}
    duplicated = {s: v for s, v in refs.items() if np.isfinite(v) and v > 1.0 + 1e-9}
    single = [s for s, v in refs.items() if np.isfinite(v) and abs(v - 1.0) <= 1e-9]
    if duplicated:
        counts = ", ".join(f"{s} {v:.2f}" for s, v in duplicated.items())
        sentences.append(f"References per triangle: {counts}. A space partition stores a triangle that "
                         f"straddles a split plane in every cell it touches; that costs memory and build "
                         f"time but keeps the cells disjoint, so a ray can stop at the first cell that "
                         f"holds a hit." + (f" {' and '.join(single)} "
                                            f"reference{'s' if len(single) == 1 else ''} every triangle once."
                                            if single else ""))
    overlap = {s: float(v) for s, r in results.items()
               if (v := _get(r, "build", "sibling_overlap")) is not None}
    if overlap:
        parts = ", ".join(f"{_percent(v)} ({s})" for s, v in overlap.items())
        sentences.append(f"Sibling boxes overlap by {parts} of their parent's surface area on average; a ray "
                         f"through an overlap must visit both children, which costs node visits.")
        if len(overlap) >= 2 and all(s in with_nodes for s in overlap):
            most, least = max(overlap, key=overlap.get), min(overlap, key=overlap.get)
            if most != least:
                consistent = with_nodes[most] >= with_nodes[least]
                sentences.append(f"{most} overlaps more than {least} and "
                                 + ("visits more nodes per ray, as expected." if consistent else
                                    "yet visits fewer nodes per ray: its tree's other choices outweigh "
                                    "the overlap here."))
    if ratio:
        a, b = ratio["a"], ratio["b"]
        sentences.append(f"Per pixel, {a} needed fewer nodes than {b} on "
                         f"{_percent(ratio['fraction_a_cheaper'])} of the image and more on "
                         f"{_percent(ratio['fraction_b_cheaper'])} (median log2 "
                         f"ratio {ratio['median_log2']:+.2f}; see the ratio map).")
    return sentences


def _table_html(headers, rows) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in headers)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _figure(uri: str | None, caption: str, css: str) -> str:
    if uri is None:
        return f'<p class="note">{html.escape(caption)}: not available.</p>'
    return (f'<figure><img class="{css}" src="{uri}" alt="{html.escape(caption)}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def _agreement_html(agreement: dict | None) -> str:
    if not agreement or not agreement.get("results"):
        return ""
    rows = [[spec, f"{a['max_abs_difference']:.3g}", _percent(a["differing_pixel_fraction"])]
            for spec, a in agreement["results"].items()]
    table = _table_html([f"against {agreement['reference']}", "largest radiance difference",
                         "pixels that differ"], rows)
    return ("<h2>Do the images agree?</h2><p>Every structure traced the same rays with the same random "
            "numbers, so the radiance images should match except where two triangles tie for the closest "
            "hit (shared edges).</p>" + table)


def write_report(path, *, scene_name: str, scene_path: str, results: dict, table: tuple,
                 displays: list, heatmaps: dict, ratio: tuple = (None, None), agreement: dict | None = None,
                 interrupted: bool = False) -> Path:
    """Write the self-contained HTML report of a comparison; returns `path`.

    results: SPEC -> statistics JSON; table: (headers, rows) from `stats_table`; displays: [(SPEC,
    display PNG path)]; heatmaps: {"nodes": path, "tris": path, ...} (shared-scale panels); ratio:
    (ratio map path or None, its summary dict or None); agreement: radiance agreement per SPEC.
    """
    ratio_path, ratio_summary = ratio
    first = next(iter(results.values()))
    r = first.get("render", {})
    title = f"tracer compare: {scene_name}"
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{html.escape(title)}</title>", f"<style>{STYLE}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p>Scene <code>{html.escape(str(scene_path))}</code>, {int(first.get("triangles", 0)):,} '
        f'triangles; {r.get("width", "?")}x{r.get("height", "?")} pixels, {r.get("samples", "?")} samples '
        f'per pixel, seed {r.get("seed", "?")}, at most {r.get("bounces", "?")} bounces; the same for every '
        "structure.</p>",
    ]
    if interrupted:
        parts.append('<p class="note">The comparison was interrupted: only the structures listed were '
                     "rendered, the last one possibly with fewer samples.</p>")
    parts += ["<h2>Statistics</h2>", _table_html(*table),
              '<p class="note">overlap: BVH sibling boxes\' intersection area over the parent\'s, mean over '
              "inner nodes; refs/tri: leaf references per triangle; p95: 95th percentile over all rays.</p>",
              "<h2>Why</h2>", f'<p class="why">{html.escape(" ".join(explain(results, ratio_summary)))}</p>',
              "<h2>Predicted against measured cost</h2>",
              _figure(_data_uri(cost_plot_png(results)), "SAH cost against mean nodes and triangles per ray",
                      "plot"),
              "<h2>Renders</h2>"]
    parts += [_figure(_file_uri(png), spec, "render") for spec, png in displays]
    parts.append("<h2>Cost per pixel, one colour scale for all structures</h2>")
    captions = {"nodes": "nodes visited per sample (all rays of the path)",
                "tris": "triangles tested per sample (all rays of the path)",
                "primary-nodes": "nodes visited by the camera ray",
                "primary-tris": "triangles tested by the camera ray"}
    for key, heat_path in heatmaps.items():
        parts.append("<div>" + _figure(_file_uri(heat_path), captions.get(key, key), "wide") + "</div>")
    if ratio_path is not None and ratio_summary is not None:
        parts.append(f"<h2>Ratio of nodes visited: {html.escape(ratio_summary['a'])} / "
                     f"{html.escape(ratio_summary['b'])}</h2>")
        parts.append("<p>log2 of the per-pixel ratio: 0 (white) where both visit as many nodes, red "
                     f"where {html.escape(ratio_summary['a'])} visits more, blue where it visits fewer. "
                     f"Costs below {ratio_summary['floor']:g} node per sample count as "
                     f"{ratio_summary['floor']:g}.</p>")
        parts.append(_figure(_file_uri(ratio_path), "log2 ratio of cost.nodes", "wide"))
    parts.append(_agreement_html(agreement))
    parts.append("</body></html>")
    path = Path(path)
    with atomic_open(path, "w", encoding="utf-8") as handle:
        handle.write("\n".join(parts) + "\n")
    return path
