"""What a notebook shows of a result: the verdict, the estimates table and two figures.

The full report (``result.save(folder)`` writes it) is several hundred kilobytes of HTML; a
notebook cell gets a light summary instead, with the cautions every output carries.
"""

from __future__ import annotations

import base64
import html

from .formatting import format_sig

__all__ = ["notebook_html", "figures"]

#: The two figures a notebook cell shows: balance and the sensitivity curve.
SHOWN = ("balance", "gamma_curve")


def figures(result, names=None) -> dict:
    """Matplotlib Figures of the report by name (every one, or those in ``names``)."""
    from .report.html import FIGURES
    from .report._style import finish, view_of

    view = view_of(result)
    wanted = [n for n, _f, _c in FIGURES] if names is None else list(names)
    known = {n: f for n, f, _c in FIGURES}
    unknown = [n for n in wanted if n not in known]
    if unknown:
        from ..errors import InputError
        raise InputError(f"`names` holds unknown figures {unknown}; choose from {list(known)}")
    return {n: finish(known[n](view), freeze=False) for n in wanted}


def _svg(fig) -> str:
    from .report._style import figure_bytes

    data = base64.b64encode(figure_bytes(fig, "svg")).decode("ascii")
    fig.clear()
    return f'<img style="max-width:32rem" src="data:image/svg+xml;base64,{data}"/>'


def notebook_html(result) -> str:
    import pandas as pd

    data = result.to_dict()
    rows = [("Headline: " + data["adjusted"].get("method", "stratified"), data["adjusted"]),
            ("Crude", data["crude"])] + [(r["method"], r) for r in data["cross_checks"]]
    table = pd.DataFrame([{"estimate": name, "value": r.get("estimate"), "CI low": r.get("ci_low"),
                           "CI high": r.get("ci_high")} for name, r in rows]).to_html(
        index=False, float_format=format_sig, border=0)
    pictures = "".join(_svg(f) for f in figures(result, SHOWN).values())
    cautions = "".join(f"<li>{html.escape(c)}</li>" for c in data["cautions"])
    return (f'<div class="stratagap-result"><p><b>stratagap</b>: {html.escape(data["verdict"])}</p>'
            f"{table}<div>{pictures}</div><ul>{cautions}</ul>"
            "<p><small>The full report: <code>result.save(folder)</code>.</small></p></div>")
