"""Colours, line styles and the drawing of the network, chosen for colour-blind readers.

Series colours are the eight-colour set of Okabe and Ito (Color Universal Design, 2008), which
stays distinguishable under the common colour-vision deficiencies. Colour is never the only
cue: in the plots each run has its own line dash, and on the canvas each kind of link has its
own line style and arrow, and a held compartment its own shape and border (see the legend).
"""

from __future__ import annotations

from urllib.parse import quote

# Okabe & Ito (2008), in their order, black moved last (it is the "reference" ink here)
SERIES = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000")
# line dashes of plotly, one per run in an overlay (solid for the first run)
RUN_DASHES = ("solid", "dash", "dot", "dashdot", "longdash", "longdashdot")
INK = "#1d2733"
MUTED = "#5b6670"
GRID = "#dde3e8"
PAPER = "#ffffff"
# light fills for the layers of a barrier (drawn behind curves; told apart by labels too)
LAYER_FILLS = ("#dceaf5", "#fbead0", "#d8efe6", "#f6dccd", "#f1e0ea", "#e2f1fa")

LINK_STYLE = {
    # kind: (colour, cytoscape line-style, line width, arrow at target, arrow at source, wording)
    "barrier": ("#0072B2", "solid", 7, "triangle", "none",
                "barrier: a stack of layers, diffusion through it (thick solid line)"),
    "exchange": ("#E69F00", "dashed", 3, "triangle", "triangle",
                 "exchange: two-way flow, no storage (dashed, arrows at both ends)"),
    "transfer": ("#CC79A7", "dotted", 3, "vee", "none",
                 "transfer: one-way first-order (dotted, open arrow)"),
}


def color(i: int) -> str:
    """The i-th series colour (cycling)."""
    return SERIES[i % len(SERIES)]


def dash(i: int) -> str:
    """The line dash of the i-th run in an overlay (cycling)."""
    return RUN_DASHES[i % len(RUN_DASHES)]


def cytoscape_stylesheet() -> list[dict]:
    """The canvas stylesheet: compartments as rounded boxes, held ones as double-bordered barrels.

    Elements are styled by their data (``kind``, ``held``), not by classes, because the canvas
    hands back its elements without classes after a node is dragged.
    """
    sheet = [
        {"selector": "node", "style": {
            "shape": "round-rectangle", "width": 120, "height": 48,
            "background-color": "#f3f7fa", "border-width": 2, "border-color": INK,
            "label": "data(label)", "text-valign": "center", "text-halign": "center",
            "text-wrap": "wrap", "text-max-width": 112, "font-size": 12, "color": INK,
            "font-family": "system-ui, sans-serif"}},
        {"selector": "node[held = 'yes']", "style": {
            "shape": "barrel", "border-style": "double", "border-width": 6,
            "background-color": "#e8ecef"}},
        {"selector": "node:selected", "style": {
            "overlay-color": "#0072B2", "overlay-opacity": 0.18, "overlay-padding": 7,
            "border-color": "#0072B2"}},
        {"selector": "node[pending = 'yes']", "style": {"border-color": "#D55E00", "border-width": 4}},
        {"selector": "edge", "style": {
            "curve-style": "bezier", "label": "data(label)", "font-size": 11, "color": INK,
            "text-background-color": "#ffffff", "text-background-opacity": 0.85,
            "text-background-padding": 2, "text-rotation": "autorotate", "text-margin-y": -12,
            "font-family": "system-ui, sans-serif", "arrow-scale": 1.3}},
        {"selector": "edge:selected", "style": {
            "overlay-color": "#0072B2", "overlay-opacity": 0.18, "overlay-padding": 6}},
    ]
    for kind, (col, style, width, target, source, _) in LINK_STYLE.items():
        sheet.append({"selector": f"edge[kind = '{kind}']", "style": {
            "line-color": col, "line-style": style, "width": width,
            "target-arrow-shape": target, "target-arrow-color": col,
            "source-arrow-shape": source, "source-arrow-color": col,
            "target-arrow-fill": "hollow" if target == "vee" else "filled"}})
    return sheet


def legend_svg(kind: str) -> str:
    """A small SVG (as a data URI) drawing one element of the canvas for the legend."""
    if kind == "compartment":
        body = (f'<rect x="3" y="5" width="54" height="22" rx="6" fill="#f3f7fa" stroke="{INK}" '
                'stroke-width="2"/>')
    elif kind == "held":
        body = (f'<path d="M8 5 H52 Q57 16 52 27 H8 Q3 16 8 5 Z" fill="#e8ecef" stroke="{INK}" '
                f'stroke-width="1.5"/><path d="M11 8.5 H49 Q53 16 49 23.5 H11 Q7 16 11 8.5 Z" '
                f'fill="none" stroke="{INK}" stroke-width="1.5"/>')
    else:
        col, style, width, target, source, _ = LINK_STYLE[kind]
        dasharray = {"solid": "", "dashed": 'stroke-dasharray="7 4"', "dotted": 'stroke-dasharray="2 3"'}[style]
        w = min(width, 5)
        body = f'<line x1="8" y1="16" x2="48" y2="16" stroke="{col}" stroke-width="{w}" {dasharray}/>'
        if target == "vee":
            body += f'<path d="M46 10 L56 16 L46 22" fill="none" stroke="{col}" stroke-width="2"/>'
        else:
            body += f'<path d="M46 9 L58 16 L46 23 Z" fill="{col}"/>'
        if source != "none":
            body += f'<path d="M10 9 L0 16 L10 23 Z" fill="{col}"/>'
    svg = f'<svg xmlns="http://www.w3.org/2000/svg" width="60" height="32" viewBox="0 0 60 32">{body}</svg>'
    return "data:image/svg+xml;charset=utf-8," + quote(svg)
