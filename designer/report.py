"""Self-contained HTML reports: text, tables, key figures and embedded PNG plots.

A report is plain data — a :class:`Report` of :class:`Section` s, each a sequence of
blocks (:class:`Paragraph`, :class:`Facts`, :class:`Table`, :class:`Image`) — turned
into one HTML file by :func:`render_html`.  Plots are embedded as base64 PNG and the
style sheet is inline, so the file works offline and can be mailed as it is.  All
text is HTML-escaped.  Used by ``compare``, ``design`` and ``evaluate --report``::

    from designer import report
    rep = report.Report("Grating G-7", sections=(
        report.evaluation_section(result_json),
        report.Section("Fields", (report.image(fig, "Ez along the path"),)),
    ), provenance=result_json["provenance"])
    report.write_report("out/report.html", rep)
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Union

from designer import io as vio

# -- blocks ------------------------------------------------------------------------

@dataclass(frozen=True)
class Paragraph:
    """A paragraph of text; ``kind`` "note" renders it smaller and muted."""

    text: str
    kind: str = "text"


@dataclass(frozen=True)
class Facts:
    """Label/value pairs shown as a two-column list (headline numbers go here)."""

    items: tuple[tuple[str, str], ...]
    headline: bool = False        # large type, for the one number that matters


@dataclass(frozen=True)
class Table:
    """A table of strings; ``highlight`` row indices are emphasized (e.g. the winner)."""

    columns: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""
    highlight: tuple[int, ...] = ()
    row_ids: tuple[str, ...] = ()   # optional id attribute per row (for tests/links)


@dataclass(frozen=True)
class Image:
    """A PNG picture embedded as base64."""

    png: bytes
    caption: str = ""
    alt: str = ""


Block = Union[Paragraph, Facts, Table, Image]


@dataclass(frozen=True)
class Section:
    title: str
    blocks: tuple[Block, ...] = ()


@dataclass(frozen=True)
class Report:
    """A whole report.  ``provenance`` is the JSON provenance block (shown at the end)."""

    title: str
    subtitle: str = ""
    sections: tuple[Section, ...] = ()
    provenance: dict | None = None
    footer: str = field(default="")


# -- building blocks from numbers and figures --------------------------------------

def fmt(value: Any, unit: str = "", digits: int = 4) -> str:
    """A number for people: ``digits`` significant digits, '—' for None/NaN."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)) and len(value) == 2:   # [re, im]
        value = complex(value[0], value[1])
    if isinstance(value, complex):
        return fmt(abs(value), unit, digits)
    if isinstance(value, (int, float)):
        if not math.isfinite(value):
            return "—"
        text = f"{value:.{digits}g}"
        return f"{text} {unit}".rstrip()
    return str(value)


def figure_png(fig, dpi: int = 110) -> bytes:
    """PNG bytes of a matplotlib figure (closed afterwards if pyplot manages it)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
    try:
        import matplotlib.pyplot as plt

        plt.close(fig)
    except Exception:  # pragma: no cover - closing is a courtesy
        pass
    return buf.getvalue()


def image(fig_or_png, caption: str = "", alt: str = "") -> Image:
    """An :class:`Image` from a matplotlib figure, PNG bytes or a PNG file path."""
    if isinstance(fig_or_png, (bytes, bytearray)):
        data = bytes(fig_or_png)
    elif isinstance(fig_or_png, (str, os.PathLike)):
        data = Path(fig_or_png).read_bytes()
    else:
        data = figure_png(fig_or_png)
    if not data.startswith(b"\x89PNG"):
        raise ValueError("report images must be PNG")
    return Image(data, caption, alt or caption)


def _fact_formatters():
    from designer import units

    return {"V/m": units.field, "m": units.length, "%": units.percent}


COUPLING_FACTS = (
    ("beta_c", "PINEM coupling |β_c|", ""),
    ("beta_c_per_field_m_per_V", "|β_c| per incident field", "m/V"),
    ("classical_max_energy_gain_eV", "classical energy gain e|I|", "eV"),
    ("gradient_V_per_m", "gradient G", "V/m"),
    ("structure_factor", "structure factor κ = G/E0", ""),
    ("max_field_in_material_V_per_m", "largest field in material", "V/m"),
    ("damage_factor", "damage factor G/E_max", ""),
    ("interaction_length_m", "interaction length", "m"),
    ("gradient_length_m", "length L for the gradient", "m"),
    ("relative_error_estimate", "relative error estimate", "%"),
)


def evaluation_section(result: dict, title: str = "Coupling") -> Section:
    """A section with the figures of one ``evaluate --json`` result: the figures, the
    set-up, the sample as evaluated (defaults made explicit), notes and cautions."""
    from designer import units
    from designer.resolved import sample_items

    c = result.get("coupling", {})
    special = _fact_formatters()
    headline = Facts((("PINEM coupling |β_c|", fmt(c.get("beta_c"))),), headline=True)
    items = [(label, special[unit](c.get(key)) if unit in special else fmt(c.get(key), unit))
             for key, label, unit in COUPLING_FACTS if key in c and key != "beta_c"]
    if "gradient_length_rule" in c:
        items.append(("how L is chosen", str(c["gradient_length_rule"])))
    if "max_field_rule" in c:
        items.append(("rule for the largest field", str(c["max_field_rule"])))
    e, las = result.get("electron", {}), result.get("laser", {})
    setup = [("beam voltage", units.voltage(e.get("voltage_V"))),
             ("β = v/c", fmt(e.get("beta"), "", 6)),
             ("laser wavelength", units.length(las.get("wavelength_m"))),
             ("angle of incidence", units.degrees(las.get("angle_deg"))
              + (f" (from {las['from']})" if las.get("from") else "")),
             ("incident peak field", units.field(las.get("peak_field_V_per_m")))]
    sample = result.get("sample", {})
    if "family" in sample:
        setup.insert(0, ("sample family", str(sample["family"])))
    blocks = [headline, Facts(tuple(items)), Paragraph("Set-up", "subhead"),
              Facts(tuple(setup))]
    if len(sample) > 1:
        blocks += [Paragraph("Sample as evaluated", "subhead"),
                   Facts(tuple(sample_items(sample)))]
    for note in result.get("notes", []):
        blocks.append(Paragraph("Note: " + note, "note"))
    for caution in result.get("cautions", []):
        blocks.append(Paragraph(caution, "note"))
    return Section(title, tuple(blocks))


# -- rendering ---------------------------------------------------------------------

_CSS = """
body{font-family:DejaVu Sans,Helvetica,Arial,sans-serif;margin:0;background:#f4f6f8;color:#1c2630}
header{background:#17324d;color:#fff;padding:18px 32px}
header h1{margin:0;font-size:24px}
header p{margin:6px 0 0;color:#c7d6e4}
main{padding:8px 32px 32px;max-width:1200px}
section{background:#fff;border:1px solid #d8e0e8;border-radius:6px;margin:18px 0;padding:12px 20px}
h2{font-size:18px;margin:6px 0 12px;color:#17324d}
p.note{font-size:13px;color:#55636f}
p.subhead{font-weight:bold;margin:14px 0 4px}
dl{display:grid;grid-template-columns:max-content auto;gap:4px 18px;margin:6px 0}
dt{color:#55636f}
dd{margin:0;font-variant-numeric:tabular-nums}
dl.headline dd{font-size:26px;font-weight:bold;color:#0d5c3f}
dl.headline dt{font-size:15px;align-self:center}
table{border-collapse:collapse;width:100%;font-size:14px;font-variant-numeric:tabular-nums}
th,td{border-bottom:1px solid #e2e8ee;padding:6px 8px;text-align:right}
th:nth-child(-n+3),td:nth-child(-n+3){text-align:left}
th{background:#e9eff5}
tr.best td{background:#e5f4ec;font-weight:bold}
caption{caption-side:bottom;text-align:left;font-size:13px;color:#55636f;padding-top:6px}
figure{margin:12px 0}
figure img{max-width:100%;border:1px solid #e2e8ee}
figcaption{font-size:13px;color:#55636f}
footer{font-size:12px;color:#55636f;padding:0 32px 24px;max-width:1200px}
pre{font-size:12px;white-space:pre-wrap}
"""


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _block_html(block: Block) -> str:
    if isinstance(block, Paragraph):
        cls = {"note": "note", "subhead": "subhead"}.get(block.kind, "")
        return f'<p class="{cls}">{_e(block.text)}</p>' if cls else f"<p>{_e(block.text)}</p>"
    if isinstance(block, Facts):
        cls = ' class="headline"' if block.headline else ""
        rows = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in block.items)
        return f"<dl{cls}>{rows}</dl>"
    if isinstance(block, Table):
        head = "".join(f"<th>{_e(c)}</th>" for c in block.columns)
        body = []
        for i, row in enumerate(block.rows):
            cls = ' class="best"' if i in block.highlight else ""
            rid = f' id="{_e(block.row_ids[i])}"' if i < len(block.row_ids) else ""
            cells = "".join(f"<td>{_e(v)}</td>" for v in row)
            body.append(f"<tr{cls}{rid}>{cells}</tr>")
        cap = f"<caption>{_e(block.caption)}</caption>" if block.caption else ""
        return (f"<table>{cap}<thead><tr>{head}</tr></thead>"
                f"<tbody>{''.join(body)}</tbody></table>")
    if isinstance(block, Image):
        data = base64.b64encode(block.png).decode("ascii")
        cap = f"<figcaption>{_e(block.caption)}</figcaption>" if block.caption else ""
        return (f'<figure><img alt="{_e(block.alt)}" src="data:image/png;base64,{data}">'
                f"{cap}</figure>")
    raise TypeError(f"not a report block: {type(block).__name__}")


def render_html(rep: Report) -> str:
    """The report as one HTML document (UTF-8, no external resources)."""
    from designer.cautions import SAFETY_NOTE

    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             '<meta name="viewport" content="width=device-width, initial-scale=1">',
             f"<title>{_e(rep.title)}</title><style>{_CSS}</style></head><body>",
             f"<header><h1>{_e(rep.title)}</h1>"
             + (f"<p>{_e(rep.subtitle)}</p>" if rep.subtitle else "") + "</header><main>"]
    for sec in rep.sections:
        parts.append(f"<section><h2>{_e(sec.title)}</h2>")
        parts.extend(_block_html(b) for b in sec.blocks)
        parts.append("</section>")
    if rep.provenance:
        parts.append("<section><h2>Provenance</h2><pre>"
                     + _e(vio.dumps(rep.provenance)) + "</pre></section>")
    parts.append("</main><footer>")
    if rep.footer:
        parts.append(f"<p>{_e(rep.footer)}</p>")
    parts.append(f"<p>{_e(SAFETY_NOTE)}</p></footer></body></html>")
    return "\n".join(parts) + "\n"


def write_report(path: str | os.PathLike, rep: Report) -> Path:
    """Render ``rep`` and write it atomically to ``path``."""
    return vio.write_atomic(path, render_html(rep))


def evaluation_report(ev, result: dict, *, title: str | None = None) -> str:
    """HTML text of the ``evaluate --report`` page: the coupling figures of ``result``
    (the ``evaluate --json`` object) and the picture of the sample and fields made
    from the evaluation ``ev`` (:func:`designer.plots.evaluation_figure`)."""
    from designer.plots import evaluation_figure

    spec = ev.spec
    name = Path(spec.source).name if spec.source and not spec.source.startswith("<") \
        else spec.source
    solver = result.get("provenance", {}).get("solver", ev.solver)
    notes = [Paragraph(f"Field solver: {solver}.", "note")]
    sections = (evaluation_section(result),
                Section("Sample and fields", (image(evaluation_figure(ev),
                                                    "The sample, the path and the field "
                                                    "along it", "sample and field plot"),
                                              *notes)))
    rep = Report(title or f"Evaluation of {name}", subtitle=f"{spec.family} sample",
                 sections=sections, provenance=result.get("provenance"))
    return render_html(rep)
