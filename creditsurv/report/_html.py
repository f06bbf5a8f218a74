"""The run report: one self-contained HTML file.

:func:`render_report` turns the tables of a run (plain DataFrames, keyed by
table name) and the run's metadata into one HTML document: inline CSS, plots
drawn with matplotlib's Agg canvas and embedded as base64 PNG, no scripts and
no external fetches. The same inputs give the same bytes.

Every section is optional. A section whose tables are absent says "not
produced in this run" instead of failing; a table that is present but lacks a
column the section needs is an error (all such problems are raised at once).

Sections, in order, each an HTML ``<section>`` with the ``id`` given:

==========================  ====================================================
``summary``                 ``meta`` run fields; headline numbers from ``loan_ecl``;
                            the validation verdicts from ``verdicts``
``cautions``                fixed text (plus a line when ``meta["synthetic"]``)
``data-checks``             ``data_checks``
``events``                  ``event_counts``
``model``                   ``coefficients``, ``meta["model"]``
``hazard-curves``           ``hazard_by_age``
``cumulative-incidence``    ``incidence_by_vintage``, ``states_by_vintage``
``scenarios``               ``scenario_paths``, ``meta["scenario_weights"]``
``pd-term-structure``       ``segment_pd_table``
``ecl``                     ``loan_ecl``, ``segment_summary``
``speeds``                  ``segment_speeds``, ``equivalent_speeds``
``validation``              ``verdicts``, ``backtest``, ``discrimination``,
                            ``calibration``, ``stability``,
                            ``coefficient_changes``; ``meta["calibration"]``
``movement``                ``movement_walk``, ``stage_migration``
``run-record``              ``meta["inputs"]``, ``meta["versions"]``, config hash
==========================  ====================================================

The columns each table needs are in :data:`REQUIRED_COLUMNS`; other columns
are ignored unless a section says otherwise. Money is in the run's currency (``meta["currency"]``,
the config's ``currency``), written beside every amount.

On the CECL basis (``meta["accounting"]`` ``cecl``, with ``meta["cecl"]``: the
forecast and reversion periods, the discounting and the lifetime loss rate) the
report speaks CECL's words: the allowance for credit losses, the lifetime loss
rate (allowance over the amortised cost basis, the balance), the reasonable and
supportable forecast period and the reversion; it has no stage tables and says
that the IFRS 9 staging tables are not produced. The IFRS 9 report is unchanged.
"""

from __future__ import annotations

import base64
import contextvars
import html
import io
import math
import re
from collections.abc import Callable, Mapping
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, MaxNLocator, PercentFormatter

from ..config import WEIGHTED
from ..errors import DataError
from ..validation import AREAS, EXPECTED_DRIFT, FAIL, WATCH, area_verdicts

__all__ = ["REQUIRED_COLUMNS", "SECTIONS", "render_report", "write_report"]

NOT_PRODUCED = "not produced in this run"
MAX_ROWS = 60  # longer tables are cut in the report; the run folder has them whole

REQUIRED_COLUMNS: dict[str, tuple[str, ...]] = {
    "loan_ecl": ("loan_id", "stage", "ead", "ecl_reported"),
    "data_checks": ("check", "severity", "count"),
    "event_counts": ("event", "loans"),
    "coefficients": ("cause", "term", "estimate"),
    "hazard_by_age": ("age", "cause", "observed", "model"),
    "incidence_by_vintage": ("vintage", "age", "cause", "model"),
    "states_by_vintage": ("vintage", "age", "state", "model"),
    "segment_pd_table": ("segment", "scenario", "year", "cumulative_pd"),
    "segment_summary": ("segment", "stage", "loans", "ecl"),
    "segment_speeds": ("segment", "age", "cpr", "cdr"),
    "equivalent_speeds": ("segment", "psa", "sda"),
    "backtest": ("cause", "n", "expected", "actual", "predicted_rate", "observed_rate"),
    "discrimination": ("auc",),
    "calibration": ("n", "pd_mean", "observed_rate"),
    "stability": ("variable", "psi"),
    "movement_walk": ("step", "ecl_change"),
    "stage_migration": (),
    "coefficient_changes": (),
    "verdicts": ("area", "item", "value", "verdict", "sentence"),
    "scenario_paths": ("scenario", "weight", "month", "series", "value", "part"),
}

# Other names in use for the same column (the first name is the one the report uses).
_ALIASES: dict[str, dict[str, str]] = {
    "segment_summary": {"n_loans": "loans", "coverage_ratio": "coverage"},
    "calibration": {"grade": "group"},
}


# --------------------------------------------------------------------------
# Formatting: every number the report shows goes through one of these.
# --------------------------------------------------------------------------


def _is_missing(x) -> bool:
    if x is None or x is pd.NA or x is pd.NaT:
        return True
    try:
        return bool(isinstance(x, (float, np.floating)) and math.isnan(x))
    except TypeError:  # pragma: no cover - exotic scalars
        return False


def _unsign_zero(text: str) -> str:
    """``-0.00`` reads as a sign error; show ``0.00``."""
    if text.startswith("-") and not any(c in "123456789" for c in text):
        return text[1:]
    return text


_CURRENCY: contextvars.ContextVar[str | None] = contextvars.ContextVar("report_currency", default=None)
"""The reporting currency of the page being rendered (the config's ``currency``), set by :func:`render_report`."""


def _amount(x) -> str:
    return "n/a" if _is_missing(x) else _unsign_zero(f"{float(x):,.2f}")


def fmt_money(x) -> str:
    """Amount with thousands separators and 2 decimals, after the reporting currency: ``GBP 1,234,567.89``.

    In a table the currency goes into the column's header once and the cells show the number alone."""
    text = _amount(x)
    currency = _CURRENCY.get()
    return f"{currency} {text}" if currency and text != "n/a" else text


def _currency_label() -> str:
    return _CURRENCY.get() or "currency"


def fmt_int(x) -> str:
    """Count with thousands separators: ``12,345``."""
    return "n/a" if _is_missing(x) else f"{int(round(float(x))):,d}"


def fmt_pct(x, decimals: int = 2) -> str:
    """A rate given as a fraction, shown in percent: ``0.01234`` -> ``1.23%``."""
    return "n/a" if _is_missing(x) else _unsign_zero(f"{100.0 * float(x):,.{decimals}f}%")


def fmt_pct3(x) -> str:
    """Monthly rates are small; three decimals of a percent."""
    return fmt_pct(x, 3)


def fmt_num(x, decimals: int = 4) -> str:
    """Plain number at fixed decimals (coefficients, test statistics)."""
    return "n/a" if _is_missing(x) else _unsign_zero(f"{float(x):,.{decimals}f}")


def fmt_stat(x) -> str:
    """Likelihood-scale statistics (log-likelihood, AIC, BIC): 2 decimals."""
    return fmt_num(x, 2)


def fmt_score(x) -> str:
    """AUC, Gini, KS: 3 decimals."""
    return fmt_num(x, 3)


def fmt_p(x) -> str:
    """p-value: 4 decimals, ``<0.0001`` below that."""
    if _is_missing(x):
        return "n/a"
    return "<0.0001" if float(x) < 1e-4 else f"{float(x):.4f}"


def fmt_speed(x) -> str:
    """A benchmark multiple in percent (``150`` -> ``150%``)."""
    return "n/a" if _is_missing(x) else _unsign_zero(f"{float(x):,.0f}%")


def fmt_text(x) -> str:
    if _is_missing(x):
        return "n/a"
    if isinstance(x, (bool, np.bool_)):
        return "yes" if x else "no"
    if isinstance(x, (float, np.floating)):
        return fmt_num(x)
    if isinstance(x, (int, np.integer)):
        return fmt_int(x)
    if isinstance(x, Mapping):
        return "; ".join(f"{k}: {fmt_text(v)}" for k, v in x.items())
    if isinstance(x, (list, tuple)):
        return " ".join(fmt_text(v) for v in x)
    return str(x)


def _default_format(series: pd.Series) -> Callable:
    if pd.api.types.is_bool_dtype(series):
        return fmt_text
    if pd.api.types.is_integer_dtype(series):
        return fmt_int
    if pd.api.types.is_float_dtype(series):
        return fmt_num
    return fmt_text


def _stage_label(x) -> str:
    """Stages arrive as 1, 1.0, "1" or "stage 1"; show ``1``."""
    if _is_missing(x):
        return "n/a"
    try:
        f = float(x)
        return str(int(f)) if f.is_integer() else str(x)
    except (TypeError, ValueError):
        return str(x)


def _is_cecl(meta) -> bool:
    """Whether the run is on the CECL basis (ASC 326): no stages, the lifetime ECL of every loan its allowance."""
    return meta.get("accounting") == "cecl"


def _allowance(loans: pd.DataFrame) -> pd.Series:
    """Each loan's allowance (``ecl_reported`` for a table written before the ``allowance`` column)."""
    return loans["allowance"] if "allowance" in loans.columns else loans["ecl_reported"]


def _loss_rate(allowance: float, balance: float) -> str:
    """The lifetime loss rate: allowance over the amortised cost basis (the balance), in percent."""
    return fmt_pct(allowance / balance) if balance else "n/a"


_DISCOUNT_TEXT = {
    "none": "not discounted (discount factors 1: a method that does not discount)",
    "effective_interest_rate": "a discounted cash flow method: each month's expected loss discounted at the loan's "
    "effective interest rate (ASC 326-20-30-4)",
}


def _cecl_basis_text(meta) -> str:
    """The CECL basis of the run in one paragraph: the periods, the reversion, the discounting."""
    c = meta.get("cecl") or {}
    held = ", ".join(c.get("hold_last_series") or [])
    long_run = c.get("long_run") or {}
    given = ", ".join(f"{k} {v:g}" for k, v in sorted(long_run.items()))
    reversion = (
        f"then every macro input moves in a straight line to its long-run value over the reversion period of "
        f"{fmt_int(c.get('reversion_months'))} months (to {c.get('reversion_end')}) and holds it after"
        if c.get("reversion_months")
        else "then every macro input takes its long-run value at once (no reversion period) and holds it"
    )
    discount = _DISCOUNT_TEXT.get(meta.get("discount") or c.get("discount"), str(meta.get("discount")))
    return (
        "Accounting basis: CECL (ASC 326). The allowance of every loan is its probability-weighted lifetime expected "
        "credit loss over the contractual term, shortened by expected prepayment; there are no stages. The scenario "
        f"paths are used over the reasonable and supportable forecast period of {fmt_int(c.get('forecast_months'))} "
        f"months (to {c.get('forecast_end')}); {reversion}. Long-run values: "
        + (f"{given}; others " if given else "")
        + "the mean of the macro history up to the reporting month"
        + (f"; {held} hold their value at the end of the forecast period" if held else "")
        + f". Discounting: {discount}."
    )


_NOT_STAGED = (
    "IFRS 9 staging does not apply on the CECL basis: the SICR sensitivity, the stage counts of the age-tail "
    "sensitivity, the PD at origination (origination view) and the stage migration are not produced."
)


# --------------------------------------------------------------------------
# HTML building blocks. All text from tables or meta passes through _e.
# --------------------------------------------------------------------------


def _e(x) -> str:
    return html.escape(str(x), quote=True)


_NUMERIC_FORMATS = {fmt_money, fmt_int, fmt_pct, fmt_pct3, fmt_num, fmt_stat, fmt_score, fmt_p, fmt_speed}


def _table(
    df: pd.DataFrame,
    columns: list[tuple[str, str, Callable]] | None = None,
    *,
    caption: str | None = None,
    name: str | None = None,
    max_rows: int = MAX_ROWS,
    flag: pd.Series | None = None,
) -> str:
    """One HTML table.

    ``columns`` lists ``(column, header, formatter)``; columns absent from
    ``df`` are skipped, and ``None`` shows every column with a formatter chosen
    by dtype. ``flag`` (boolean, aligned with ``df``) marks rows to draw the
    eye to. Tables longer than ``max_rows`` are cut with a note naming the full
    table ``name``.
    """
    if columns is None:
        columns = [(c, str(c), _default_format(df[c])) for c in df.columns]
    columns = [c for c in columns if c[0] in df.columns]
    n = len(df)
    shown = df.iloc[:max_rows]
    align = [' class="num"' if fmt in _NUMERIC_FORMATS else "" for _, _, fmt in columns]
    currency = _CURRENCY.get()
    if currency:  # amounts: the currency once in the header, the numbers alone in the cells
        columns = [(c, f"{h} ({currency})", _amount) if fmt is fmt_money else (c, h, fmt) for c, h, fmt in columns]
    head = "".join(f'<th scope="col"{a}>{_e(h)}</th>' for (_, h, _), a in zip(columns, align))
    flags = (
        np.zeros(len(shown), dtype=bool) if flag is None else np.asarray(flag.iloc[:max_rows].fillna(False), dtype=bool)
    )
    rows = []
    for i, (_, row) in enumerate(shown.iterrows()):
        cells = "".join(f"<td{a}>{_e(fmt(row[col]))}</td>" for (col, _, fmt), a in zip(columns, align))
        rows.append(f'<tr class="flag">{cells}</tr>' if flags[i] else f"<tr>{cells}</tr>")
    if not rows:
        rows.append(f'<tr><td colspan="{max(len(columns), 1)}">no rows</td></tr>')
    cap = f"<caption>{_e(caption)}</caption>" if caption else ""
    note = ""
    if n > max_rows:
        where = f" (full table: <code>{_e(name)}</code> in the run folder)" if name else ""
        note = f'<p class="note">First {max_rows:,d} of {n:,d} rows shown{where}.</p>'
    return (
        f'<div class="table-wrap"><table>{cap}<thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table></div>{note}"
    )


def _pairs(items: list[tuple[str, str]], caption: str | None = None) -> str:
    """Two-column table of label and already-formatted value."""
    cap = f"<caption>{_e(caption)}</caption>" if caption else ""
    body = "".join(f'<tr><th scope="row">{_e(k)}</th><td>{_e(v)}</td></tr>' for k, v in items)
    return f'<div class="table-wrap"><table class="pairs">{cap}<tbody>{body}</tbody></table></div>'


def _absent(*names: str) -> str:
    what = ", ".join(f"<code>{_e(n)}</code>" for n in names)
    return f'<p class="absent">{what}: {NOT_PRODUCED}.</p>'


def _plural(n: int, word: str) -> str:
    return f"{n:,d} {word}" + ("" if n == 1 else "s")


def _h3(text: str) -> str:
    return f"<h3>{_e(text)}</h3>"


def _p(text: str, cls: str | None = None) -> str:
    return f'<p class="{cls}">{_e(text)}</p>' if cls else f"<p>{_e(text)}</p>"


# --------------------------------------------------------------------------
# Plots: matplotlib Figure on an Agg canvas, never pyplot, so global state
# and the user's backend are left alone.
# --------------------------------------------------------------------------

_INK = "#262626"
_GRID = "#d9d9d9"
# Muted, distinguishable in grey print too (line styles change with colour).
_COLORS = ["#2b4c6f", "#b5651d", "#4f7942", "#7a3b69", "#6e6e6e", "#a08a2a", "#3f8f8f", "#9c4a3c"]
_STYLES = ["-", "--", "-.", ":", "-", "--", "-.", ":"]
_BAND = "#c8d3df"

_RC = {
    "font.family": "DejaVu Sans",
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.labelsize": 8.5,
    "axes.edgecolor": _INK,
    "axes.labelcolor": _INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": _GRID,
    "grid.linewidth": 0.6,
    "axes.prop_cycle": matplotlib.cycler(color=_COLORS, linestyle=_STYLES),
    "xtick.color": _INK,
    "ytick.color": _INK,
    "legend.frameon": False,
    "legend.fontsize": 7.5,
    "lines.linewidth": 1.4,
    "svg.hashsalt": "creditsurv",
    # Text from the data (segment, scenario and level names) is drawn as written: "$100k-$250k" is not maths.
    "text.parse_math": False,
    "figure.dpi": 100,
}
_WIDTH = 7.2  # inches: fits a portrait A4 or Letter page inside 15 mm margins
_DPI = 130


def _figure(nplots: int, *, ncols: int = 2, height: float = 2.8, sharey: bool = False, width: float = _WIDTH):
    ncols = max(1, min(ncols, nplots))
    nrows = math.ceil(nplots / ncols)
    fig = Figure(figsize=(width, height * nrows), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False, sharey=sharey).ravel()
    for ax in axes[nplots:]:
        ax.set_visible(False)
    return fig, list(axes[:nplots])


def _img(fig: Figure, alt: str) -> str:
    buf = io.BytesIO()
    # No "Software" text chunk: the PNG bytes depend only on the drawing.
    fig.canvas.print_figure(buf, format="png", dpi=_DPI, metadata={"Software": None})
    data = base64.b64encode(buf.getvalue()).decode("ascii")
    return f'<figure><img src="data:image/png;base64,{data}" alt="{_e(alt)}"></figure>'


def _style_axes(
    ax, *, xlabel: str, ylabel: str, title: str | None = None, pct_y: bool = False, legend: bool = True
) -> None:
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    if title:
        ax.set_title(title)
    if pct_y:
        ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=None))
    if legend and ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best")


def _figure_legend(fig: Figure, axes) -> None:
    """One legend above all panels, for series shared by every panel; kept off the data."""
    handles, labels = {}, []
    for ax in axes:
        for h, label in zip(*ax.get_legend_handles_labels()):
            if label not in handles:
                handles[label] = h
                labels.append(label)
    if labels:
        fig.legend([handles[k] for k in labels], labels, loc="outside upper center", ncols=min(len(labels), 5))


def _thousands() -> FuncFormatter:
    return FuncFormatter(lambda v, _: f"{v:,.0f}")


def _label(x) -> str:
    """A series label from the data, drawn as written: matplotlib leaves labels starting with "_" out of
    legends, so such a label gets a zero-width space in front."""
    text = str(x)
    return "\u200b" + text if text.startswith("_") else text


def _style(i: int) -> dict:
    return {"color": _COLORS[i % len(_COLORS)], "linestyle": _STYLES[i % len(_STYLES)]}


def _ordered(values) -> list:
    """Distinct values in first-seen order."""
    return list(dict.fromkeys(values))


# --------------------------------------------------------------------------
# Sections: each takes (tables, meta) and returns its body HTML.
# --------------------------------------------------------------------------


def _summary(tables, meta) -> str:
    model = meta.get("model") or {}
    version = meta.get("version") or (meta.get("versions") or {}).get("creditsurv")
    items = [
        ("Run id", meta.get("run_id")),
        ("Reporting month", meta.get("reporting_month", meta.get("as_of"))),
        ("Config", meta.get("config_name", meta.get("config"))),
        ("Created", meta.get("created") or "recorded in manifest.json (created); the page holds no clock time, so a "
         "reproduction of the run gives the same bytes"),
        ("creditsurv version", version),
        ("Model", model.get("kind")),
    ]
    out = [_pairs([(k, fmt_text(v)) for k, v in items], caption="Run")]
    loans = tables.get("loan_ecl")
    if loans is None:
        out.append(_absent("loan_ecl"))
        return "".join(out) + _verdict_summary(tables)
    if _is_cecl(meta):
        out.append(_cecl_headline(loans, meta))
        return "".join(out) + _verdict_summary(tables)
    ead, ecl = loans["ead"].sum(), loans["ecl_reported"].sum()
    out.append(
        _pairs(
            [
                ("Loans", fmt_int(len(loans))),
                ("Total EAD", fmt_money(ead)),
                ("Total reported ECL", fmt_money(ecl)),
                ("Coverage (reported ECL / EAD)", fmt_pct(ecl / ead) if ead else "n/a"),
            ],
            caption="Headline numbers",
        )
    )
    out.append(_table(_by_stage(loans), _STAGE_COLUMNS, caption="Reported ECL by stage"))
    if "stage_reason" in loans.columns:
        out.append(_table(_by_reason(loans), _REASON_COLUMNS, caption="Stages 2 and 3 by reason"))
    if meta.get("origination_view"):
        out.append(_p(_origination_view_text(meta["origination_view"])))
    low = meta.get("low_credit_risk")
    if low:
        out.append(_p(
            f"Low credit risk (IFRS 9 5.5.10): {fmt_int(low.get('live_loans', 0))} live loans with a 12-month PD at or "
            f"below {fmt_pct(low.get('pd_12m_at_most', 0.0), 3)} are exempt from the SICR test; the 30 days past due "
            "backstop and the watch list still apply to them."
        ))  # fmt: skip
    if meta.get("sicr_history"):
        out.append(_p(f"Staging: {meta['sicr_history']}."))
    routes = meta.get("default_routes")
    if routes:
        out.append(_p(_exposure_text(routes, meta.get("arrears_fee") or 0.0)))
    if meta.get("past_term"):
        out.append(_p(
            f"{meta['past_term']:,d} live loans are at or past their contractual term with a balance left; each is "
            "treated as due now: projected over one month, its whole balance the exposure."
        ))  # fmt: skip
    return "".join(out) + _verdict_summary(tables)


def _cecl_headline(loans: pd.DataFrame, meta) -> str:
    """The CECL summary: the allowance and the lifetime loss rate, the basis, the exposure notes; no stages."""
    allowance = float(_allowance(loans).sum())
    balance = float(loans["balance"].sum()) if "balance" in loans.columns else float("nan")
    out = [
        _pairs(
            [
                ("Accounting basis", "CECL (ASC 326)"),
                ("Loans", fmt_int(len(loans))),
                ("Amortised cost basis (balance)", fmt_money(balance)),
                ("Total EAD", fmt_money(loans["ead"].sum())),
                ("Allowance for credit losses", fmt_money(allowance)),
                ("Lifetime loss rate (allowance / amortised cost basis)", _loss_rate(allowance, balance)),
            ],
            caption="Headline numbers",
        ),
        _p(_cecl_basis_text(meta)),
    ]
    if "arrears_state" in loans.columns:
        out.append(_table(_by_arrears_state(loans), _ARREARS_COLUMNS, caption="Allowance by arrears state"))
    routes = meta.get("default_routes")
    if routes:
        out.append(_p(_exposure_text(routes, meta.get("arrears_fee") or 0.0)))
    if meta.get("past_term"):
        out.append(_p(
            f"{meta['past_term']:,d} live loans are at or past their contractual term with a balance left; each is "
            "treated as due now: projected over one month, its whole balance the exposure."
        ))  # fmt: skip
    out.append(_p(_NOT_STAGED, "note"))
    return "".join(out)


_ARREARS_COLUMNS = [
    ("arrears_state", "Arrears state", fmt_text),
    ("loans", "Loans", fmt_int),
    ("balance", "Amortised cost basis", fmt_money),
    ("allowance", "Allowance", fmt_money),
    ("loss_rate", "Lifetime loss rate", fmt_pct),
]


def _by_arrears_state(loans: pd.DataFrame) -> pd.DataFrame:
    """Loans, balance and allowance by arrears state at the reporting month (current first, default last, the
    arrears states between by days past due), with an ``all`` row."""
    frame = pd.DataFrame({"arrears_state": loans["arrears_state"].astype(str), "balance": loans["balance"],
                          "allowance": _allowance(loans)})  # fmt: skip
    g = frame.groupby("arrears_state", sort=False)
    out = g.agg(loans=("balance", "size"), balance=("balance", "sum"), allowance=("allowance", "sum")).reset_index()

    def order(state: str):
        days = re.match(r"\d+", state)
        return (0, 0) if state == "current" else (2, 0) if state == "default" else (1, int(days.group()) if days else 0)

    out = out.iloc[sorted(range(len(out)), key=lambda i: order(out["arrears_state"].iloc[i]))]
    total = pd.DataFrame({"arrears_state": ["all"], "loans": [len(frame)], "balance": [frame["balance"].sum()],
                          "allowance": [frame["allowance"].sum()]})  # fmt: skip
    out = pd.concat([out, total], ignore_index=True)
    out["loss_rate"] = out["allowance"] / out["balance"].where(out["balance"] != 0)
    return out


def _not_judged(items: pd.DataFrame) -> str:
    """One sentence naming the inputs that move with the calendar, with their PSI."""
    names = ", ".join(f"{r.item} (PSI {fmt_num(r.value)})" for r in items.itertuples(index=False))
    return (
        f"Not judged, {EXPECTED_DRIFT} (inputs that move with the calendar, left out of the stability verdict): "
        f"{names}."
    )


def _verdict_summary(tables) -> str:
    """The verdict of every validation area, and what was seen for every item that is fail or watch."""
    v = tables.get("verdicts")
    if v is None:
        return ""
    if v.empty:
        return _p("Validation verdicts: no statistic of the validation pack could be judged in this run.")
    areas = area_verdicts(v)
    rows = []
    for area, verdict in areas.items():
        items = v[v["area"] == area]
        counts = items["verdict"].value_counts()
        parts = [f"{int(counts[w])} {w}" for w in ("pass", WATCH, FAIL, EXPECTED_DRIFT) if w in counts]
        rows.append({"area": AREAS.get(area, area), "verdict": verdict, "items": ", ".join(parts)})
    frame = pd.DataFrame(rows)
    out = [
        _table(
            frame, [("area", "Area", fmt_text), ("verdict", "Verdict", fmt_text), ("items", "Items", fmt_text)],
            caption="Validation verdicts", flag=frame["verdict"].isin([WATCH, FAIL]),
        ),
        _p(
            "Each area's verdict is the worst of its items (fail over watch over pass). The thresholds are in the "
            "config (validation.thresholds; common practice by default) and each sentence states its rule; the "
            "table validation/verdicts.csv has every item.",
            "note",
        ),
    ]
    seen = [v[v["verdict"] == w] for w in (FAIL, WATCH)]
    if any(len(x) for x in seen):
        out.append("<p>What was seen, for every item that is fail or watch:</p>")
        out.append(_sentences(pd.concat(seen)))
    drift = v[v["verdict"] == EXPECTED_DRIFT]
    if len(drift):
        out.append(_p(_not_judged(drift), "note"))
    return "".join(out)


def _sentences(items: pd.DataFrame) -> str:
    """A list of the items' sentences; each carries its verdict in words."""
    return '<ul class="verdicts">' + "".join(f"<li>{_e(s)}</li>" for s in items["sentence"]) + "</ul>"


def _area_verdicts(tables, *areas: str) -> str:
    """Under a validation heading: each area's verdict in words, and its items' sentences (every item of a small
    area; in a larger one those that are not pass)."""
    v = tables.get("verdicts")
    if v is None:
        return ""
    out = []
    for area in areas:
        items = v[v["area"] == area]
        if items.empty:
            continue
        verdict = area_verdicts(items)[area]
        out.append(f'<p class="verdict">{_e(AREAS.get(area, area))}: verdict <strong>{_e(verdict)}</strong>.</p>')
        judged = items[items["verdict"] != EXPECTED_DRIFT]
        shown = judged if len(judged) <= 3 else judged[judged["verdict"] != "pass"]
        if len(shown):
            out.append(_sentences(shown))
        if len(judged) > len(shown):
            out.append(_p(f"The other {_plural(len(judged) - len(shown), 'item')} pass.", "note"))
    return "".join(out)


def _origination_view_text(view: dict) -> str:
    """The basis of the SICR test's comparison, in one paragraph."""
    if view.get("basis") == "stored":
        model = view.get("model") or "a model version the config does not state"
        return (
            f"SICR basis: today's probability-weighted lifetime PD against the stored PD at origination "
            f"(loan-table column {view.get('column')}, made by {model})."
        )
    held = ", ".join(view.get("hold_last_series") or [])
    text = (
        f"SICR basis: like with like on one path each. Today's lifetime PD under the {view.get('scenario')} scenario "
        f"against the PD at origination projected from the origination month's macro values, moving in a straight "
        f"line to the history's mean up to then over {view.get('reversion_months')} months"
        + (f" ({held} held)" if held else "")
        + "; the reported PD and ECL stay probability-weighted."
    )
    before = view.get("before_macro_history") or 0
    if before:
        text += f" {fmt_int(before)} loans were originated before the macro history starts: their origination view reads its first month."
    return text


def _exposure_text(routes: dict, fee: float) -> str:
    """The exposure-at-default basis of the run, in one paragraph."""
    share = fmt_pct(routes.get("days_past_due_share", 1.0))
    if routes.get("source") == "development window":
        basis = f"{share} of the development window's {fmt_int(routes.get('defaults', 0))} defaults"
    else:
        basis = f"{share} of defaults ({routes.get('source')})"
    text = (
        "Exposure at default: the balance after the last paid instalment plus interest at the effective rate for "
        f"the instalments missed before default ({routes.get('onset_months')} for a default on days past due, "
        f"{routes.get('onset_months_status')} on a status code alone; {basis} were on days past due)"
    )
    if fee:
        text += f", plus a fee of {fee:,.2f} per missed instalment"
    return text + ". Loans in default take the balance and missed instalments of their own delinquency in the panel."


_REASON_COLUMNS = [
    ("stage", "Stage", fmt_text),
    ("stage_reason", "Reason (triggers joined by +)", fmt_text),
    ("loans", "Loans", fmt_int),
    ("ead", "EAD", fmt_money),
    ("ecl", "Reported ECL", fmt_money),
]


def _by_reason(loans: pd.DataFrame) -> pd.DataFrame:
    impaired = loans[loans["stage"] > 1]
    g = impaired.groupby(["stage", "stage_reason"], sort=True)
    out = g.agg(loans=("ead", "size"), ead=("ead", "sum"), ecl=("ecl_reported", "sum")).reset_index()
    out["stage"] = out["stage"].map(_stage_label)
    return out


_STAGE_COLUMNS = [
    ("stage", "Stage", fmt_text),
    ("loans", "Loans", fmt_int),
    ("ead", "EAD", fmt_money),
    ("ecl", "Reported ECL", fmt_money),
    ("coverage", "Coverage (ECL / EAD)", fmt_pct),
]


def _by_stage(loans: pd.DataFrame) -> pd.DataFrame:
    stage = loans["stage"].map(_stage_label)
    g = pd.DataFrame({"stage": stage, "ead": loans["ead"], "ecl": loans["ecl_reported"]}).groupby("stage", sort=True)
    out = g.agg(loans=("ead", "size"), ead=("ead", "sum"), ecl=("ecl", "sum")).reset_index()
    total = pd.DataFrame(
        {"stage": ["all"], "loans": [len(loans)], "ead": [loans["ead"].sum()], "ecl": [loans["ecl_reported"].sum()]}
    )
    out = pd.concat([out, total], ignore_index=True)
    out["coverage"] = out["ecl"] / out["ead"].where(out["ead"] != 0)
    return out


def _cautions(tables, meta) -> str:
    lines = [
        "The figures in this report are model estimates. Before they are relied on, the model must be "
        "validated independently under the institution's model risk policy.",
        "Accounting judgement and local supervisory rules prevail over anything in this report, "
        "including stage allocation, scenario weights and overlays.",
    ]
    if _is_cecl(meta):
        lines[1] = (
            "Accounting judgement and local supervisory rules prevail over anything in this report, including the "
            "reasonable and supportable forecast period, the reversion to long-run values, the scenario weights, "
            "the discounting basis and overlays."
        )
    loosened = (meta.get("model") or {}).get("limits_loosened")
    if loosened:
        text = ", ".join(f"model.fit.{k} = {v:g}" for k, v in loosened.items())
        lines.insert(
            0,
            f"WARNING: the model was accepted under limits looser than the defaults ({text}). A model with so few "
            "events per parameter or such coefficients would otherwise have been refused as untrustworthy.",
        )
    if meta.get("synthetic"):
        lines.append(
            "This run uses synthetic demonstration data. The loans, borrowers and amounts are generated "
            "and describe no real lender or borrower."
        )
    return '<ul class="cautions">' + "".join(f"<li>{_e(t)}</li>" for t in lines) + "</ul>"


def _check_status(row) -> str:
    if row["severity"] == "off":
        return "not run"
    if row["count"] == 0:
        return "passed"
    return "failed" if row["severity"] == "error" else "warning"


def _data_checks(tables, meta) -> str:
    checks = tables.get("data_checks")
    if checks is None:
        return _absent("data_checks")
    df = checks.copy()
    df["status"] = [_check_status(r) for _, r in df.iterrows()] if len(df) else pd.Series(dtype=object)
    fired = df["status"].isin(["failed", "warning"])
    counts = df["status"].value_counts()
    tally = ", ".join(f"{counts.get(s, 0):,d} {s}" for s in ("passed", "warning", "failed", "not run"))
    head = _p(f"{_plural(len(df), 'check')}: {tally}.")
    cols = [
        ("check", "Check", fmt_text),
        ("status", "Status", fmt_text),
        ("severity", "Severity", fmt_text),
        ("count", "Rows flagged", fmt_int),
        ("description", "What it checks", fmt_text),
    ]
    return head + _table(df, cols, name="data_checks", max_rows=max(MAX_ROWS, len(df)), flag=fired)


def _events(tables, meta) -> str:
    ev = tables.get("event_counts")
    if ev is None:
        return _absent("event_counts")
    cols = [
        ("event", "Outcome", fmt_text),
        ("censor_reason", "Censoring reason", lambda x: "" if _is_missing(x) else fmt_text(x)),  # events have none
        ("loans", "Loans", fmt_int),
    ]
    total = ev["loans"].sum()
    return _table(ev, cols, name="event_counts") + _p(f"Loans in total: {fmt_int(total)}.")


def _model(tables, meta) -> str:
    out = []
    model = meta.get("model")
    if model:
        labels = [
            ("kind", "Model kind", fmt_text),
            ("loglik", "Log-likelihood", fmt_stat),
            ("aic", "AIC", fmt_stat),
            ("bic", "BIC", fmt_stat),
            ("n_rows", "Loan-months fitted", fmt_int),
            ("events", "Events", fmt_text),
            ("iterations", "Iterations", fmt_int),
            ("converged", "Converged", fmt_text),
        ]
        out.append(_pairs([(h, f(model[k])) for k, h, f in labels if k in model], caption="Fit"))
    else:
        out.append(_absent('meta["model"]'))
    fits = tables.get("transition_fits")
    if fits is not None:
        out.append(
            _p(
                "A multi-state model: one multinomial logit per arrears state over the states its loans move to "
                "(staying is the reference). Each loan is projected as a Markov chain from its arrears state at the "
                "reporting month; the probability of entering default each month is its marginal PD. Covariates "
                "follow their own projection rule and do not react to the projected arrears."
            )
        )
        cols = [
            ("origin", "From", fmt_text),
            ("destination", "To", fmt_text),
            ("loan_months", "Moves seen", fmt_int),
            ("design", "Fitted with", fmt_text),
            ("parameters", "Parameters", fmt_int),
        ]
        out.append(_table(fits, cols, caption="How each move between states was fitted", name="transition_fits"))
    coef = tables.get("coefficients")
    if coef is None:
        out.append(_absent("coefficients"))
        return "".join(out)
    cols = [
        ("cause", "Cause", fmt_text),
        ("term", "Term", fmt_text),
        ("estimate", "Estimate", fmt_num),
        ("std_error", "Std. error", fmt_num),
        ("z", "z", fmt_stat),
        ("p_value", "p-value", fmt_p),
        ("ci_lo", "CI low", fmt_num),
        ("ci_hi", "CI high", fmt_num),
    ]
    out.append(_table(coef, cols, caption="Coefficients (log-odds scale)", name="coefficients", max_rows=150))
    return "".join(out)


def _hazard_curves(tables, meta) -> str:
    hz = tables.get("hazard_by_age")
    if hz is None:
        return _absent("hazard_by_age")
    causes = _ordered(hz["cause"])
    if not causes:
        return _p("The table has no rows.")
    fig, axes = _figure(len(causes))
    for ax, cause in zip(axes, causes):
        d = hz[hz["cause"] == cause].sort_values("age", kind="stable")
        ax.plot(
            d["age"], d["observed"], linestyle="none", marker="o", markersize=2.5, color=_COLORS[4], label="observed"
        )
        ax.plot(d["age"], d["model"], color=_COLORS[0], linestyle="-", label="model")
        _style_axes(
            ax, xlabel="Loan age (months)", ylabel="Monthly hazard (% of loans at risk)", title=str(cause), pct_y=True
        )
    return _img(fig, "Observed and model monthly hazard by loan age") + _p(
        "Monthly hazard: events in the month divided by loans at risk at the start of the month.", "note"
    )


_MAX_VINTAGES = 8


def _cumulative_incidence(tables, meta) -> str:
    inc = tables.get("incidence_by_vintage")
    if inc is None:
        return _absent("incidence_by_vintage")
    out = _by_vintage_chart(inc, "cause", "Cumulative incidence (% of vintage)", "Cumulative incidence by vintage")
    states = tables.get("states_by_vintage")
    if states is not None:
        transient = states[~states["state"].isin(["default", "prepaid"])]
        out += "<h3>Arrears states by vintage</h3>" + _by_vintage_chart(
            transient, "state", "Share of vintage in the state", "Arrears states by vintage"
        ) + _p(
            "Each arrears state's share of the vintage at each age from origination, first spells only (a loan "
            "leaves the comparison when it defaults). Points: the Aalen-Johansen estimate of the Markov "
            "multi-state model from the observed monthly transitions; lines: the model's chain from origination "
            "on the realised macro path. Default and prepaid appear as cumulative incidence above. Inputs that "
            "the projection holds (a refreshed score, months since arrears) do not drift or react to projected "
            "arrears; a gap that widens with age points at them.",
            "note",
        )
    return out


def _by_vintage_chart(table: pd.DataFrame, panel: str, ylabel: str, alt: str) -> str:
    """One panel per value of ``panel``: model lines and observed points (with their interval) by vintage and age."""
    panels = _ordered(table[panel])
    if not panels:
        return _p("The table has no rows.")
    vintages = sorted(_ordered(table["vintage"]), key=str)
    note = ""
    if len(vintages) > _MAX_VINTAGES:
        keep = np.unique(np.linspace(0, len(vintages) - 1, _MAX_VINTAGES).round().astype(int))
        vintages = [vintages[i] for i in keep]
        note = _p(f"{len(vintages)} of {table['vintage'].nunique():,d} vintages shown, evenly spaced.", "note")
    has_obs = "observed" in table.columns
    has_band = has_obs and {"observed_lo", "observed_hi"} <= set(table.columns)
    fig, axes = _figure(len(panels))
    for ax, key in zip(axes, panels):
        for i, v in enumerate(vintages):
            d = table[(table[panel] == key) & (table["vintage"] == v)].sort_values("age", kind="stable")
            if d.empty:
                continue
            st = _style(i)
            if has_band:
                ax.fill_between(
                    d["age"], d["observed_lo"], d["observed_hi"], color=st["color"], alpha=0.12, linewidth=0
                )
            if has_obs:
                ax.plot(d["age"], d["observed"], linestyle="none", marker="o", markersize=2, color=st["color"])
            ax.plot(d["age"], d["model"], label=_label(v), **st)
        _style_axes(ax, xlabel="Loan age (months)", ylabel=ylabel, title=str(key), pct_y=True, legend=False)
    _figure_legend(fig, axes)
    text = "Lines: model; points: observed (Aalen-Johansen)"
    text += ", shaded: its interval." if has_band else "."
    return _img(fig, alt) + _p(text, "note") + note


def _pick_weighting(pdt: pd.DataFrame) -> tuple[pd.DataFrame, str | None]:
    if "weighting" not in pdt.columns:
        return pdt, None
    for w in ("balance", "count"):
        if (pdt["weighting"] == w).any():
            return pdt[pdt["weighting"] == w], w
    first = pdt["weighting"].iloc[0] if len(pdt) else None
    return pdt[pdt["weighting"] == first], first


_MAX_SEGMENT_PANELS = 6


def _scenario_paths(tables, meta) -> str:
    """One panel per macro series: the history, then each scenario's path (weight in the legend) and its extension."""
    paths = tables.get("scenario_paths")
    if paths is None:
        return _absent("scenario_paths")
    if paths.empty:
        return _p("The run read no macro series.")
    series = _ordered(paths["series"])
    fig, axes = _figure(len(series))
    scenarios = _ordered(paths["scenario"])
    for ax, name in zip(axes, series):
        d = paths[paths["series"] == name]
        history = d[(d["part"] == "history") & (d["scenario"] == scenarios[0])]
        x_of = {m: i for i, m in enumerate(_ordered(d["month"]))}
        ax.plot([x_of[m] for m in history["month"]], history["value"], color=_INK, linewidth=1.2, label="history")
        for i, sc in enumerate(scenarios):
            own = d[(d["scenario"] == sc) & (d["part"] != "history")]
            weight = float(own["weight"].iloc[0]) if len(own) else 0.0
            style = _style(i + 1)
            given = own[own["part"] == "scenario"]
            ax.plot([x_of[m] for m in given["month"]], given["value"], label=f"{sc} ({fmt_pct(weight, 0)})", **style)
            ext = own[own["part"] == "extension"]
            if len(ext):
                ax.plot([x_of[m] for m in ext["month"]], ext["value"], alpha=0.4, linewidth=2.5, **style)
        months = list(x_of)
        ticks = list(range(0, len(months), max(len(months) // 5, 1)))
        ax.set_xticks(ticks, [months[t] for t in ticks])
        _style_axes(ax, xlabel="Month", ylabel=str(name), title=str(name), legend=False)
    _figure_legend(fig, axes)
    weights = meta.get("scenario_weights") or {}
    text = "Black: history up to the reporting month; coloured: each scenario's path as given, faded: its extension"
    if _is_cecl(meta):
        c = meta.get("cecl") or {}
        text = (
            "Black: history up to the reporting month; coloured: each scenario's path over the reasonable and "
            f"supportable forecast period (to {c.get('forecast_end')}), faded: the reversion to the long-run values "
            f"over {fmt_int(c.get('reversion_months'))} months, then the long-run values"
        )
    else:
        text += " by the config's rule"
    text += ". Weights: " + ", ".join(f"{k} {fmt_pct(v, 0)}" for k, v in weights.items()) + "."
    return _img(fig, "Macro series by scenario") + _p(text, "note")


def _pd_term_structure(tables, meta) -> str:
    pdt = tables.get("segment_pd_table")
    if pdt is None:
        return _absent("segment_pd_table")
    pdt, weighting = _pick_weighting(pdt)
    if pdt.empty:
        return _p("The table has no rows.")
    out = []
    if weighting:
        out.append(_p(f"Segment PDs are means over loans weighted by {weighting}.", "note"))
    segments = _ordered(pdt["segment"])
    scenarios = _ordered(pdt["scenario"])
    w = pdt[pdt["scenario"] == WEIGHTED]
    if not w.empty:
        fig, (ax,) = _figure(1, height=3.2)
        for i, seg in enumerate(segments):
            d = w[w["segment"] == seg].sort_values("year", kind="stable")
            ax.plot(d["year"], d["cumulative_pd"], marker="o", markersize=3, label=_label(seg), **_style(i))
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        _style_axes(
            ax,
            xlabel="Years after the reporting month",
            ylabel="Cumulative PD (%)",
            title="Probability-weighted scenarios",
            pct_y=True,
        )
        out.append(_img(fig, "Cumulative PD by year per segment, probability-weighted"))
        wide = w.pivot_table(index="segment", columns="year", values="cumulative_pd", sort=False).reset_index()
        cols = [("segment", "Segment", fmt_text)] + [(y, f"Year {y}", fmt_pct) for y in wide.columns[1:]]
        out.append(_table(wide, cols, caption="Cumulative PD, probability-weighted", name="segment_pd_table"))
    per = [s for s in scenarios if s != WEIGHTED]
    if per:
        shown = segments[:_MAX_SEGMENT_PANELS]
        fig, axes = _figure(len(shown), ncols=3 if len(shown) > 4 else 2, height=2.5, sharey=True)
        for ax, seg in zip(axes, shown):
            for i, s in enumerate(per):
                d = pdt[(pdt["segment"] == seg) & (pdt["scenario"] == s)].sort_values("year", kind="stable")
                ax.plot(d["year"], d["cumulative_pd"], label=_label(s), **_style(i))
            ax.xaxis.set_major_locator(MaxNLocator(integer=True))
            _style_axes(
                ax,
                xlabel="Years after the reporting month",
                ylabel="Cumulative PD (%)",
                title=str(seg),
                pct_y=True,
                legend=False,
            )
        _figure_legend(fig, axes)
        out.append(_img(fig, "Cumulative PD by year per segment and scenario"))
        if len(segments) > len(shown):
            out.append(_p(f"First {len(shown)} of {len(segments)} segments shown by scenario.", "note"))
    return "".join(out)


def _scenarios(loans: pd.DataFrame) -> list[str]:
    found = [m.group(1) for c in loans.columns if (m := re.fullmatch(r"ecl_lifetime_(.+)", str(c)))]
    return [s for s in found if s != WEIGHTED and f"ecl_12m_{s}" in loans.columns]


def _ecl_by_scenario(loans: pd.DataFrame, scenarios: list[str], weights: Mapping) -> pd.DataFrame:
    """ECL at each loan's stage horizon: 12 months in stage 1, lifetime otherwise."""
    stage1 = (loans["stage"].map(_stage_label) == "1").to_numpy()
    rows = []
    for s in scenarios:
        at = np.where(stage1, loans[f"ecl_12m_{s}"], loans[f"ecl_lifetime_{s}"])
        rows.append(
            {
                "scenario": s,
                "weight": weights.get(s, np.nan),
                "ecl_12m": loans[f"ecl_12m_{s}"].sum(),
                "ecl_lifetime": loans[f"ecl_lifetime_{s}"].sum(),
                "ecl_stage": float(np.sum(at)),
            }
        )
    rows.append(
        {
            "scenario": WEIGHTED,
            "weight": np.nan,
            "ecl_12m": loans["ecl_12m"].sum() if "ecl_12m" in loans.columns else np.nan,
            "ecl_lifetime": loans["ecl_lifetime"].sum() if "ecl_lifetime" in loans.columns else np.nan,
            "ecl_stage": loans["ecl_reported"].sum(),
        }
    )
    return pd.DataFrame(rows)


def _ecl_plot(stages: pd.DataFrame, scen: pd.DataFrame) -> str:
    fig, (ax1, ax2) = _figure(2, height=3.0)
    ax1.bar(stages["stage"].astype(str), stages["ecl"], color=_COLORS[0], width=0.6)
    _style_axes(ax1, xlabel="Stage", ylabel=f"Reported ECL ({_currency_label()})", title="By stage")
    colors = [_COLORS[4] if s == WEIGHTED else _COLORS[1] for s in scen["scenario"]]
    ax2.bar([str(s) for s in scen["scenario"]], scen["ecl_stage"], color=colors, width=0.6)
    ax2.tick_params(axis="x", labelrotation=30)
    _style_axes(ax2, xlabel="Scenario", ylabel=f"ECL at stage horizon ({_currency_label()})", title="By scenario")
    for ax in (ax1, ax2):
        ax.yaxis.set_major_formatter(_thousands())
    return _img(fig, "ECL by stage and by scenario")


def _cecl_allowance(loans: pd.DataFrame, meta) -> str:
    """The CECL allowance by segment and by scenario (lifetime for every loan), with the basis."""
    weights = {str(k): v for k, v in (meta.get("scenario_weights") or {}).items()}
    scen = _ecl_by_scenario(loans, _scenarios(loans), weights)  # lifetime for every loan: the weighted row's is the allowance
    out = []
    if not loans.empty:
        seg = pd.DataFrame({"segment": loans["segment"].astype(str), "allowance": _allowance(loans)})
        seg = seg.groupby("segment", sort=True)["allowance"].sum().reset_index()
        fig, (ax1, ax2) = _figure(2, height=3.0)
        ax1.bar(seg["segment"], seg["allowance"], color=_COLORS[0], width=0.6)
        ax1.tick_params(axis="x", labelrotation=30)
        _style_axes(ax1, xlabel="Segment", ylabel=f"Allowance ({_currency_label()})", title="By segment")
        colors = [_COLORS[4] if s == WEIGHTED else _COLORS[1] for s in scen["scenario"]]
        ax2.bar([str(s) for s in scen["scenario"]], scen["ecl_lifetime"], color=colors, width=0.6)
        ax2.tick_params(axis="x", labelrotation=30)
        _style_axes(ax2, xlabel="Scenario", ylabel=f"Lifetime expected credit loss ({_currency_label()})", title="By scenario")
        for ax in (ax1, ax2):
            ax.yaxis.set_major_formatter(_thousands())
        out.append(_img(fig, "Allowance by segment and by scenario"))
    out.append(_p(_cecl_basis_text(meta)))
    cols = [
        ("scenario", "Scenario", fmt_text),
        ("weight", "Weight", fmt_pct),
        ("ecl_lifetime", "Lifetime expected credit loss, all loans", fmt_money),
    ]
    if not weights:
        cols = [c for c in cols if c[0] != "weight"]
    out.append(_table(scen, cols, caption="Lifetime expected credit loss by scenario"))
    out.append(_p("The weighted row is the allowance: the probability-weighted lifetime expected credit loss.", "note"))
    return "".join(out)


def _ecl(tables, meta) -> str:
    loans = tables.get("loan_ecl")
    cecl = _is_cecl(meta)
    out = []
    if loans is not None and cecl:
        out.append(_cecl_allowance(loans, meta))
    elif loans is None:
        out.append(_absent("loan_ecl"))
    else:
        stages = _by_stage(loans)
        stages = stages[stages["stage"] != "all"]
        weights = {str(k): v for k, v in (meta.get("scenario_weights") or {}).items()}
        scen = _ecl_by_scenario(loans, _scenarios(loans), weights)
        if not loans.empty:
            out.append(_ecl_plot(stages, scen))
        out.append(_table(stages, _STAGE_COLUMNS, caption="Reported ECL by stage"))
        cols = [
            ("scenario", "Scenario", fmt_text),
            ("weight", "Weight", fmt_pct),
            ("ecl_12m", "12-month ECL, all loans", fmt_money),
            ("ecl_lifetime", "Lifetime ECL, all loans", fmt_money),
            ("ecl_stage", "ECL at stage horizon", fmt_money),
        ]
        if not weights:
            cols = [c for c in cols if c[0] != "weight"]
        out.append(_table(scen, cols, caption="ECL by scenario"))
        out.append(
            _p(
                "Stage horizon: 12 months for stage 1, lifetime for stages 2 and 3. "
                "The weighted row is the reported ECL.",
                "note",
            )
        )
    states = tables.get("arrears_states")
    if states is not None:
        cols = [
            ("state", "Arrears state", fmt_text),
            ("loans", "Loans", fmt_int),
            ("loan_share", "Share of loans", fmt_pct),
            ("balance", "Balance", fmt_money),
            ("balance_share", "Share of balance", fmt_pct),
        ]
        out.append(_table(states, cols, caption="Arrears states at the reporting month", name="arrears_states"))
    sens = tables.get("sicr_sensitivity")
    if cecl:
        out.append(_p(_NOT_STAGED, "note"))
    elif sens is not None:
        cols = [
            ("multiplier", "Relative threshold, x configured", fmt_stat),
            ("sicr_relative", "Lifetime PD now / at origination at least", fmt_stat),
            ("stage_2_loans", "Stage 2 loans", fmt_int),
            ("stage_2_share", "Stage 2 share of loans not in default", fmt_pct),
            ("stage_2_sicr_loans", "Of them through SICR", fmt_int),
            ("ecl_reported", "Reported ECL", fmt_money),
            ("ecl_change", "Change against the configured threshold", fmt_money),
        ]
        out.append(_table(sens, cols, caption="Stage 2 and ECL against the relative SICR threshold", name="sicr_sensitivity"))
        out.append(
            _p(
                "Every other staging rule as configured (absolute threshold, backstop, watch list, probation); "
                "each loan's 12-month and lifetime ECL are the run's, only the horizon it reports moves.",
                "note",
            )
        )
    tail = tables.get("age_tail_sensitivity")
    if tail is not None:
        cols = [
            ("tail", "Age tail rule", fmt_text),
            ("supported_age", "Last supported age (months)", fmt_int),
            ("share_of_defaults_beyond", "Expected defaults at older ages", fmt_pct),
            ("stage_2_loans", "Stage 2 loans", fmt_int),
            ("ecl_lifetime", "Lifetime ECL, all loans", fmt_money),
            ("ecl_reported", "Reported ECL", fmt_money),
            ("ecl_change", "Change against the rule in use", fmt_money),
        ]
        if cecl:  # no stages; the reported ECL is the allowance
            cols = [c for c in cols if c[0] not in ("stage_2_loans", "ecl_lifetime")]
            cols = [(c, "Allowance", f) if c == "ecl_reported" else (c, h, f) for c, h, f in cols]
        out.append(_table(tail, cols, caption="Loan ages beyond the development data", name="age_tail_sensitivity"))
        used = tail.loc[tail["in_use"].astype(bool), "tail"]
        out.append(_p(
            "The supported ages run to the last with enough development loan-months "
            "(model.baseline.tail_min_loan_months); older months are projected at the last supported age (hold) "
            "or by the baseline carried on (extrapolate). Expected defaults: the scenario-weighted defaulted "
            f"balance. The run uses {used.iloc[0] if len(used) else 'the first row'}; the other row is the same "
            "run with the other rule.",
            "note",
        ))  # fmt: skip
    seg = tables.get("segment_summary")
    if seg is None:
        out.append(_absent("segment_summary"))
    elif cecl:
        cols = [
            ("segment", "Segment", fmt_text),
            ("loans", "Loans", fmt_int),
            ("balance", "Amortised cost basis", fmt_money),
            ("ead", "EAD", fmt_money),
            ("ecl", "Allowance", fmt_money),
            ("coverage", "Lifetime loss rate", fmt_pct),
        ]
        out.append(_table(seg, cols, caption="By segment", name="segment_summary"))
        out.append(_p(
            "Lifetime loss rate: the allowance divided by the amortised cost basis (the balance at the reporting "
            "month).", "note",
        ))  # fmt: skip
    else:
        cols = [
            ("segment", "Segment", fmt_text),
            ("stage", "Stage", _stage_label),
            ("loans", "Loans", fmt_int),
            ("balance", "Balance", fmt_money),
            ("ead", "EAD", fmt_money),
            ("ecl", "Reported ECL", fmt_money),
            ("coverage", "Coverage", fmt_pct),
        ]
        out.append(_table(seg, cols, caption="By segment and stage", name="segment_summary"))
        if "coverage" in seg.columns:
            out.append(_p("Coverage: reported ECL divided by balance.", "note"))
    return "".join(out)


def _speeds(tables, meta) -> str:
    out = []
    sp = tables.get("segment_speeds")
    if sp is None:
        out.append(_absent("segment_speeds"))
    elif not sp.empty:
        fig, (ax1, ax2) = _figure(2, height=3.0)
        for i, seg in enumerate(_ordered(sp["segment"])):
            d = sp[sp["segment"] == seg].sort_values("age", kind="stable")
            ax1.plot(d["age"], d["cpr"], label=_label(seg), **_style(i))
            ax2.plot(d["age"], d["cdr"], label=_label(seg), **_style(i))
        _style_axes(
            ax1, xlabel="Loan age (months)", ylabel="CPR (% a year)", title="Prepayment", pct_y=True, legend=False
        )
        _style_axes(ax2, xlabel="Loan age (months)", ylabel="CDR (% a year)", title="Default", pct_y=True, legend=False)
        _figure_legend(fig, [ax1])
        out.append(_img(fig, "CPR and CDR by loan age per segment"))
        out.append(_p("CPR = 1 - (1 - SMM)^12 and CDR = 1 - (1 - MDR)^12, annualised from the monthly rates.", "note"))
    eq = tables.get("equivalent_speeds")
    if eq is None:
        out.append(_absent("equivalent_speeds"))
    else:
        cols = [
            ("segment", "Segment", fmt_text),
            ("psa", "Equivalent PSA", fmt_speed),
            ("sda", "Equivalent SDA", fmt_speed),
        ]
        out.append(_table(eq, cols, caption="Equivalent benchmark speeds", name="equivalent_speeds"))
    return "".join(out)


_BACKTEST_KNOWN = {
    "cause",
    "n",
    "expected",
    "actual",
    "predicted_rate",
    "observed_rate",
    "observed_lo",
    "observed_hi",
    "outside",
    "z",
    "z_factor",
}


def _backtest_plot(bt: pd.DataFrame, group: str) -> str:
    causes = _ordered(bt["cause"])
    fig, axes = _figure(len(causes), ncols=1, height=2.6)
    for ax, cause in zip(axes, causes):
        d = bt[bt["cause"] == cause]
        x = np.arange(len(d))
        if {"observed_lo", "observed_hi"} <= set(d.columns):
            ax.fill_between(x, d["observed_lo"], d["observed_hi"], color=_BAND, linewidth=0, label="observed interval")
        ax.plot(x, d["observed_rate"], linestyle="none", marker="o", markersize=3, color=_INK, label="observed")
        ax.plot(x, d["predicted_rate"], color=_COLORS[1], linestyle="-", label="predicted")
        labels = [str(v) for v in d[group]]
        step = max(1, math.ceil(len(labels) / 12))
        ax.set_xticks(x[::step], labels[::step], rotation=30, ha="right")
        xlabel = str(group).replace("_", " ").capitalize()
        _style_axes(
            ax, xlabel=xlabel, ylabel="Monthly rate (% of loans at risk)", title=str(cause), pct_y=True, legend=False
        )
    _figure_legend(fig, axes)
    return _img(fig, f"Predicted and observed rate by {group}")


def _discrimination_part(tables, meta) -> str:
    disc = tables.get("discrimination")
    if disc is None or disc.empty:
        return _absent("discrimination")
    r = disc.iloc[0]
    auc = fmt_score(r["auc"])
    if "auc_lo" in disc.columns and "auc_hi" in disc.columns:
        auc += f" (interval {fmt_score(r['auc_lo'])} to {fmt_score(r['auc_hi'])})"
    items = [
        ("Loans", fmt_int(r.get("n"))),
        ("Defaults", fmt_int(r.get("defaults"))),
        ("AUC", auc),
        ("Gini", fmt_score(r.get("gini"))),
        ("KS", fmt_score(r.get("ks"))),
    ]
    return _pairs([(k, v) for k, v in items if v != "n/a"], caption="12-month PD against 12-month default")


def _calibration_plot(cal: pd.DataFrame) -> str:
    fig, (ax,) = _figure(1, height=3.6, width=4.6)
    x, y = cal["pd_mean"].to_numpy(float), cal["observed_rate"].to_numpy(float)
    yerr = None
    if {"observed_lo", "observed_hi"} <= set(cal.columns):
        lo, hi = cal["observed_lo"].to_numpy(float), cal["observed_hi"].to_numpy(float)
        yerr = np.clip(np.vstack([y - lo, hi - y]), 0, None)
    top = float(np.nanmax(np.r_[x, y if yerr is None else y + yerr[1], 0.0])) * 1.05
    top = top if np.isfinite(top) and top > 0 else 1.0
    ax.plot([0, top], [0, top], color=_COLORS[4], linestyle="--", linewidth=1, label="predicted = observed")
    ax.errorbar(x, y, yerr=yerr, fmt="o", markersize=3.5, color=_COLORS[0], capsize=2, label="group")
    if "group" in cal.columns:  # each point named by its group: the score band, or the PD group's number
        for xi, yi, g in zip(x, y, cal["group"]):
            ax.annotate(str(g), (xi, yi), textcoords="offset points", xytext=(5, -9), fontsize=7, color=_INK)
    ax.set_xlim(0, top)
    ax.set_ylim(0, top)
    ax.xaxis.set_major_formatter(PercentFormatter(xmax=1.0, decimals=None))
    _style_axes(ax, xlabel="Mean predicted 12-month PD (%)", ylabel="Observed default rate (%)", pct_y=True)
    return _img(fig, "Calibration: observed default rate against mean predicted PD")


def _calibration_part(tables, meta) -> str:
    cal = tables.get("calibration")
    if cal is None:
        return _absent("calibration")
    out = []
    hl = meta.get("calibration") or {}
    if hl:
        out.append(
            _p(
                f"Hosmer-Lemeshow statistic {fmt_stat(hl.get('hl_statistic'))} on {fmt_text(hl.get('hl_df'))} "
                f"degrees of freedom, p-value {fmt_p(hl.get('hl_p_value'))}."
                + (
                    " The outcomes fall after the development window, an external sample: the statistic is "
                    "referred to as many degrees of freedom as groups (none estimated from these outcomes)."
                    if hl.get("hl_sample") == "external" else ""
                )
            )
        )
    if not cal.empty:
        out.append(_calibration_plot(cal))
    grouping = str(hl.get("grouping", ""))
    group = f"Band of {grouping.removeprefix('grades of ')}" if grouping.startswith("grades of ") else "PD group"
    cols = [
        ("group", group, fmt_text),
        ("n", "Loans", fmt_int),
        ("pd_mean", "Mean PD", fmt_pct),
        ("expected", "Expected defaults", fmt_num),
        ("actual", "Defaults", fmt_int),
        ("observed_rate", "Default rate", fmt_pct),
        ("observed_lo", "Rate low", fmt_pct),
        ("observed_hi", "Rate high", fmt_pct),
        ("p_value", "p-value", fmt_p),
    ]
    out.append(_table(cal, cols, name="calibration"))
    return "".join(out)


def _transition_matrices(tables) -> str:
    """Observed against model one-month transition matrices of the development window, one row per origin state."""
    moves = tables.get("transitions_development")
    if moves is None or moves.empty:
        return ""
    order = list(dict.fromkeys(moves["origin"])) + [d for d in dict.fromkeys(moves["destination"]) if d not in set(moves["origin"])]
    out = []
    for what, column in (("observed", "observed_rate"), ("model", "predicted_rate")):
        wide = moves.pivot(index="origin", columns="destination", values=column).reindex(index=order[: moves["origin"].nunique()], columns=order)
        wide = wide.reset_index()
        cols = [("origin", "From", fmt_text)] + [(c, f"To {c}", fmt_pct3) for c in order]
        out.append(_table(wide, cols, caption=f"One-month transition matrix, development window: {what}"))
    out.append(
        _p(
            "The model's row is the mean of its probabilities over the development months starting in the state; "
            "with a free intercept for every move it reproduces the observed shares (a check of the fit).",
            "note",
        )
    )
    return "".join(out)


def _backtest_part(tables, meta) -> str:
    bt = tables.get("backtest")
    if bt is None:
        return _absent("backtest")
    out = []
    groups = [c for c in bt.columns if c not in _BACKTEST_KNOWN]
    if len(groups) == 1 and not bt.empty:
        out.append(_backtest_plot(bt, groups[0]))
    elif not bt.empty:
        out.append(_p("The plot is drawn when the backtest is grouped by one column.", "note"))
    if meta.get("fit_on") == "development_and_out_of_time":
        out.append(_p(
            "In-sample: the model was fitted on the development and out-of-time windows together, so this backtest "
            "(and the discrimination and calibration on the 12 months after the development window) tests the "
            "model on months it was fitted to."
        ))  # fmt: skip
    cols = [(g, str(g).replace("_", " ").capitalize(), fmt_text) for g in groups] + [
        ("cause", "Cause", fmt_text),
        ("n", "Loan-months", fmt_int),
        ("expected", "Expected", fmt_num),
        ("actual", "Actual", fmt_int),
        ("predicted_rate", "Predicted rate", fmt_pct3),
        ("observed_rate", "Observed rate", fmt_pct3),
        ("observed_lo", "Observed low", fmt_pct3),
        ("observed_hi", "Observed high", fmt_pct3),
        ("outside", "Outside interval", fmt_text),
        ("z", "z", fmt_stat),
        ("z_factor", "z, one factor", fmt_stat),
    ]
    flag = bt["outside"].eq(True) if "outside" in bt.columns else None
    out.append(_table(bt, cols, name="backtest", flag=flag))
    if "z_factor" in bt.columns:
        rho = meta.get("asset_correlation")
        out.append(_p(
            "z treats every loan-month as independent; z, one factor lets the loan-months of a row share one "
            "economic factor (Vasicek's one-factor model"
            + (f", asset correlation {rho:g}" if rho is not None else "")
            + "), so a common surprise of the period, such as a macro shock the scenario did not have, is not "
            "read as model failure.", "note",
        ))  # fmt: skip
    moves = tables.get("backtest_transitions")
    if moves is not None:
        cols = [
            ("origin", "From", fmt_text),
            ("destination", "To", fmt_text),
            ("n", "Loan-months in the state", fmt_int),
            ("expected", "Expected", fmt_num),
            ("actual", "Actual", fmt_int),
            ("predicted_rate", "Predicted rate", fmt_pct3),
            ("observed_rate", "Observed rate", fmt_pct3),
            ("z", "z", fmt_stat),
            ("z_factor", "z, one factor", fmt_stat),
            ("verdict", "Verdict", fmt_text),
        ]
        moves = _with_move_verdicts(moves, tables.get("verdicts"))
        flag = moves["verdict"].isin([WATCH, FAIL]) if "verdict" in moves.columns else moves["z"].abs().gt(2)
        out.append(_table(moves, cols, caption="Out-of-time moves between arrears states, one month ahead",
                          name="backtest_transitions", flag=flag))  # fmt: skip
        out.append(
            _p(
                "Each month's move against the model's probabilities given the state and inputs at its start: "
                "roll, cure, default and prepayment rates per state. Each move's verdict reads the two-sided "
                "p-value of its one-factor z; rows that are watch or fail are marked (staying is the rest of the "
                "state's months and has no verdict of its own).",
                "note",
            )
        )
    return "".join(out)


def _with_move_verdicts(moves: pd.DataFrame, verdicts: pd.DataFrame | None) -> pd.DataFrame:
    """``moves`` with the verdict of each move (``verdicts`` items of ``backtest_transitions``), when known."""
    if verdicts is None:
        return moves
    mine = verdicts[verdicts["area"] == "backtest_transitions"].set_index("item")["verdict"]
    items = moves["origin"].astype(str) + " to " + moves["destination"].astype(str)
    return moves.assign(verdict=items.map(mine).where(moves["origin"] != moves["destination"], "").to_numpy())


def _stability_part(tables, meta) -> str:
    st = tables.get("stability")
    if st is None:
        return _absent("stability")
    cols = [("variable", "Variable", fmt_text), ("psi", "PSI", fmt_num), ("verdict", "Verdict", fmt_text)]
    flag = st["verdict"].isin([WATCH, FAIL]) if "verdict" in st.columns else None
    out = _area_verdicts(tables, "stability") + _table(st, cols, name="stability", flag=flag)
    if "verdict" in st.columns and (st["verdict"] == EXPECTED_DRIFT).any():
        out += _p(
            "Inputs that move with the calendar (macro series, loan age) are not judged: their verdict is expected "
            "drift whatever their PSI, and they are left out of the stability verdict. They differ between the "
            "development window and the reporting month by construction, so their PSI is no signal about the model."
        )
    return out


def _validation(tables, meta) -> str:
    out = [
        _h3("Discrimination"),
        _area_verdicts(tables, "discrimination"),
        _discrimination_part(tables, meta),
        _h3("Calibration"),
        _area_verdicts(tables, "calibration"),
        _calibration_part(tables, meta),
        _h3("Backtest"),
        _area_verdicts(tables, "backtest_default", "backtest_prepay", "backtest_transitions"),
        _transition_matrices(tables),
        _backtest_part(tables, meta),
        _h3("Stability"),
        _stability_part(tables, meta),
    ]
    curves = _area_verdicts(tables, "vintage_curves")
    if curves:
        out += [
            _h3("Vintage curves against Aalen-Johansen"),
            curves,
            _p("The curves are drawn in the section on cumulative incidence by vintage.", "note"),
        ]
    changes = tables.get("coefficient_changes")
    if changes is not None:
        out += [_h3("Coefficient changes"), _table(changes, name="coefficient_changes")]
    return "".join(out)


def _movement(tables, meta) -> str:
    out = []
    cecl = _is_cecl(meta)
    walk = tables.get("movement_walk")
    if walk is None and cecl:
        return _p(
            "No previous run was named (outputs.prior_run is not set), so this report has no movement: the walk of the "
            "allowance from the previous month's total to this one needs the previous run's loan table. Set "
            "outputs.prior_run to the previous month's run folder, or compare two finished runs with creditsurv "
            "compare RUN_A RUN_B."
        )
    if walk is None and tables.get("stage_migration") is None:
        return _p(
            "No previous run was named (outputs.prior_run is not set), so this report has no movement: the ECL walk "
            "from the previous month's total to this one and the stage migration need the previous run's loan "
            "table. Set outputs.prior_run to the previous month's run folder, or compare two finished runs with "
            "creditsurv compare RUN_A RUN_B."
        )
    if walk is not None and cecl:  # no stages: no transfer between them
        walk = walk[~walk["step"].astype(str).str.startswith("stage_transfer_")]
    what = "the allowance" if cecl else "reported ECL"
    if walk is None:
        out.append(_absent("movement_walk"))
    else:
        steps = walk[walk["ecl_change"].notna()]
        if not steps.empty:
            fig, (ax,) = _figure(1, height=0.3 * len(steps) + 1.0)
            y = np.arange(len(steps))[::-1]
            v = steps["ecl_change"].to_numpy(float)
            ax.barh(y, v, color=np.where(v >= 0, _COLORS[1], _COLORS[0]), height=0.6)
            ax.set_yticks(y, [str(s).replace("_", " ") for s in steps["step"]])
            ax.axvline(0, color=_INK, linewidth=0.8)
            ax.xaxis.set_major_formatter(_thousands())
            _style_axes(ax, xlabel=f"Change in {what} ({_currency_label()})", ylabel="")
            out.append(_img(fig, "Allowance movement by step" if cecl else "ECL movement by step"))
        cols = [
            ("step", "Step", fmt_text),
            ("loans", "Loans", fmt_int),
            ("ecl_change", "Allowance change" if cecl else "ECL change", fmt_money),
            ("ecl_balance", "Allowance after step" if cecl else "ECL after step", fmt_money),
        ]
        caption = "Allowance walk from the previous run" if cecl else "ECL walk from the previous run"
        out.append(_table(walk, cols, caption=caption, name="movement_walk"))
    mig = tables.get("stage_migration")
    if cecl:
        out.append(_p("No stage migration: the CECL basis has no stages.", "note"))
    elif mig is None:
        out.append(_absent("stage_migration"))
    elif {"stage_from", "stage_to", "loans"} <= set(mig.columns):
        wide = mig.pivot_table(
            index="stage_from", columns="stage_to", values="loans", aggfunc="sum", fill_value=0, sort=False
        )
        wide = wide.reset_index()
        cols = [("stage_from", "From \\ to", fmt_text)] + [(c, str(c), fmt_int) for c in wide.columns[1:]]
        out.append(_table(wide, cols, caption="Stage migration (loans)", name="stage_migration"))
    else:
        out.append(_table(mig, caption="Stage migration", name="stage_migration"))
    return "".join(out)


def _run_record(tables, meta) -> str:
    out = []
    inputs = meta.get("inputs")
    if inputs:
        df = pd.DataFrame(list(inputs))
        cols = [
            ("input", "Config key", fmt_text),
            ("path", "Path (from the config's folder)", fmt_text),
            ("bytes", "Bytes", fmt_int),
            ("sha256", "SHA-256", fmt_text),
        ]
        rows = meta.get("input_rows") or {}
        if rows:  # rows read per config key; a glob's files share their key's count
            df["rows"] = [rows.get(k) if k in rows and (df["input"] == k).sum() == 1 else None for k in df["input"]]
            cols.insert(2, ("rows", "Rows", lambda x: "" if _is_missing(x) else fmt_int(x)))
        caption = "Every file the run read"
        out.append(_table(df, cols, caption=caption, max_rows=max(MAX_ROWS, len(df))))
        shared = sorted(k for k in rows if (df["input"] == k).sum() > 1)
        if shared:
            out.append(_p("Rows of the files of one glob, together: " + "; ".join(f"{k} {fmt_int(rows[k])}" for k in shared) + ".", "note"))
    else:
        out.append(_absent('meta["inputs"]'))
    config_hash = meta.get("config_sha256", meta.get("config_hash"))
    items = [("Config SHA-256", config_hash), ("Seed", None if meta.get("seed") is None else str(meta.get("seed")))]
    out.append(_pairs([(k, fmt_text(v)) for k, v in items if v is not None], caption="Config"))
    versions = meta.get("versions")
    if versions:
        out.append(_pairs([(str(k), str(v)) for k, v in versions.items()], caption="Versions"))
    else:
        out.append(_absent('meta["versions"]'))
    return "".join(out)


SECTIONS: tuple[tuple[str, str, Callable[[dict, dict], str]], ...] = (
    ("summary", "Summary", _summary),
    ("cautions", "Cautions", _cautions),
    ("data-checks", "Data checks", _data_checks),
    ("events", "Outcomes", _events),
    ("model", "Hazard model", _model),
    ("hazard-curves", "Hazard by loan age", _hazard_curves),
    ("cumulative-incidence", "Cumulative incidence by vintage", _cumulative_incidence),
    ("scenarios", "Macro scenarios", _scenario_paths),
    ("pd-term-structure", "PD term structure", _pd_term_structure),
    ("ecl", "Expected credit loss", _ecl),
    ("speeds", "Prepayment and default speeds", _speeds),
    ("validation", "Validation", _validation),
    ("movement", "Movement since the previous run", _movement),
    ("run-record", "Run record", _run_record),
)
"""Sections in report order: ``(id, title, function(tables, meta) -> body HTML)``."""

_CECL_TITLES = {"ecl": "Allowance for credit losses (CECL)", "movement": "Movement of the allowance since the previous run"}
"""The sections' titles on the CECL basis, where they differ."""


# --------------------------------------------------------------------------
# Document
# --------------------------------------------------------------------------

_CSS = """
:root { --ink: #262626; --muted: #5f5f5f; --rule: #c9c9c9; --shade: #f3f3f1; --mark: #fbf3df; }
* { box-sizing: border-box; }
body { font-family: "Helvetica Neue", Arial, "DejaVu Sans", sans-serif; color: var(--ink);
       font-size: 14px; line-height: 1.45; max-width: 62rem; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; }
header { border-bottom: 2px solid var(--ink); margin-bottom: 1rem; }
h1 { font-size: 1.5rem; margin: 0 0 .25rem; }
h2 { font-size: 1.2rem; border-bottom: 1px solid var(--rule); padding-bottom: .2rem; margin: 2.2rem 0 .8rem; }
h3 { font-size: 1rem; margin: 1.4rem 0 .5rem; }
nav ol { columns: 2; margin: .5rem 0 0; padding-left: 1.4rem; }
nav a { color: var(--ink); }
.sub, .note { color: var(--muted); font-size: .88rem; }
.absent { color: var(--muted); font-style: italic; }
.table-wrap { overflow-x: auto; margin: .6rem 0; }
table { border-collapse: collapse; font-size: .85rem; max-width: 100%; }
caption { text-align: left; font-weight: bold; padding: .2rem 0; }
th, td { padding: .22rem .55rem; border-bottom: 1px solid var(--rule); text-align: left; vertical-align: top;
         overflow-wrap: anywhere; }
thead th { border-bottom: 1.5px solid var(--ink); background: var(--shade); }
table.pairs th { font-weight: normal; color: var(--muted); }
.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.flag td { background: var(--mark); font-weight: bold; }
ul.verdicts li { margin-bottom: .3rem; }
figure { margin: .8rem 0; }
figure img { max-width: 100%; height: auto; display: block; }
ul.cautions li { margin-bottom: .35rem; }
code { font-size: .9em; }
@page { margin: 15mm; }
@media print {
  body { font-size: 10pt; max-width: none; padding: 0; }
  nav { display: none; }
  section { break-before: page; }
  section#summary, section#cautions { break-before: auto; }
  h2, h3, caption { break-after: avoid; }
  figure, tr { break-inside: avoid; }
  thead { display: table-header-group; }
  .table-wrap { overflow: visible; }
  table { font-size: 8pt; width: 100%; }
  .num { white-space: normal; }
  th, td { padding: .1rem .3rem; }
  thead th, tr.flag td { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
}
"""


def _validate(tables: Mapping[str, pd.DataFrame]) -> dict[str, pd.DataFrame]:
    """Rename known aliases and collect every missing column in one pass."""
    out, problems = {}, []
    for name, df in tables.items():
        if df is None:
            continue
        if not isinstance(df, pd.DataFrame):
            problems.append(f"{name}: expected a DataFrame, got {type(df).__name__}")
            continue
        rename = {a: c for a, c in _ALIASES.get(name, {}).items() if a in df.columns and c not in df.columns}
        df = df.rename(columns=rename) if rename else df
        missing = [c for c in REQUIRED_COLUMNS.get(name, ()) if c not in df.columns]
        if missing:
            problems.append(f"{name}: lacks columns {missing}; it has {[str(c) for c in df.columns]}")
        out[name] = df
    if problems:
        raise DataError("report: tables cannot be shown:\n  " + "\n  ".join(problems))
    return out


def render_report(tables: Mapping[str, pd.DataFrame], meta: Mapping) -> str:
    """Render a run's report as one self-contained HTML document.

    Parameters
    ----------
    tables : mapping of str to DataFrame
        Run tables by name (see the module docstring and
        :data:`REQUIRED_COLUMNS`). Absent tables, or ``None`` values, leave
        their section saying "not produced in this run". Not modified.
    meta : mapping
        Run metadata. Keys read: ``run_id``, ``reporting_month`` (or
        ``as_of``), ``config_name`` (or ``config``), ``created``, ``version``
        (or ``versions["creditsurv"]``), ``synthetic`` (bool), ``model``
        (``kind``, ``loglik``, ``aic``, ``bic``, ``n_rows``, ``events``,
        ``iterations``, ``converged``), ``calibration`` (``hl_statistic``,
        ``hl_df``, ``hl_p_value``), ``scenario_weights`` (scenario -> weight),
        ``inputs`` (list of dicts with ``input``, ``path``,
        ``bytes``, ``sha256``), ``versions`` (package -> version),
        ``config_sha256`` (or ``config_hash``), ``seed``, ``currency`` (ISO 4217 code written beside every
        amount), ``accounting`` (``ifrs9``, the default, or ``cecl``), ``discount``, ``cecl``
        (``forecast_months``, ``forecast_end``, ``reversion_months``, ``reversion_end``, ``long_run``,
        ``hold_last_series``). All optional.

    Returns
    -------
    str
        The HTML document. The same inputs give the same string.

    Raises
    ------
    DataError
        A table that is present lacks a column its section needs; every such
        table is named in one message.
    """
    tables = _validate(tables)
    meta = dict(meta or {})
    run_id = meta.get("run_id")
    title = "creditsurv run report" + (f": {run_id}" if run_id else "")
    month = meta.get("reporting_month", meta.get("as_of"))
    titles = {sid: (_CECL_TITLES.get(sid, t) if _is_cecl(meta) else t) for sid, t, _ in SECTIONS}
    nav = "".join(f'<li><a href="#{sid}">{_e(titles[sid])}</a></li>' for sid, _, _ in SECTIONS)
    body = []
    token = _CURRENCY.set(meta.get("currency"))
    try:
        with matplotlib.rc_context(_RC):  # plot style for this call only; global rcParams untouched
            for i, (sid, _, fn) in enumerate(SECTIONS, start=1):
                heading = titles[sid]
                body.append(f'<section id="{sid}">\n<h2>{i}. {_e(heading)}</h2>\n{fn(tables, meta)}\n</section>')
    finally:
        _CURRENCY.reset(token)
    sub = f'<p class="sub">Reporting month {_e(month)}</p>' if month else ""
    if meta.get("currency"):
        sub += f'<p class="sub">Amounts in {_e(meta["currency"])}</p>'
    else:
        sub += '<p class="sub">Amounts in the book\'s currency (the config names none: set <code>currency</code>)</p>'
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f"<header><h1>{_e(title)}</h1>{sub}</header>\n"
        f'<nav aria-label="Contents"><ol>{nav}</ol></nav>\n' + "\n".join(body) + "\n</body>\n</html>\n"
    )


def write_report(path, tables: Mapping[str, pd.DataFrame], meta: Mapping) -> Path:
    """Render the report and write it to ``path`` as UTF-8; returns the path."""
    path = Path(path)
    path.write_text(render_report(tables, meta), encoding="utf-8", newline="\n")
    return path
