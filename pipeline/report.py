"""Reports a person would rather look at than read: one self-contained HTML file.

``matchbay report STORE [--lot ID] [--dut ID] -o DIR`` writes ``DIR/<lot>.html`` (a lot)
or ``DIR/<dut>.html`` (one unit) from a results store; :func:`write_report` is the call.

A lot report holds: the key numbers (yield at the spec as measured -> with the lot's
shared network, the shared network itself from the radio to the antenna, its tolerance
yield, the median worst-case return loss), the histogram of worst-case return loss
before and after, the return-loss curves of every unit with the band shaded, one Smith
chart of every unit with and without the shared network, the spread of Q and of the
matching headroom (Bode–Fano bound minus achieved), a table of every unit (failing ones
first), the files that could not be read, and a section with plots per unit for a
bounded number of units (``unit_plots``: the units with the lowest return loss, so the
failing ones first; a 2,000-unit lot would otherwise make a huge, slow file). A unit
report shows one unit's match: return loss before/after with the band shaded and the
Bode–Fano bound, and a Smith chart with the load, the path of each part and the matched
point.

Self-contained and safe: one file, pictures embedded as ``data:`` PNGs, inline CSS, no
script, no font or style sheet from anywhere; a Content-Security-Policy meta tag tells
the browser to fetch nothing at all. Every string that comes from an input (unit names,
lot ids, paths, failure reasons, part-library descriptions, fixture chains) goes through
:func:`html.escape`. The file is written to a temporary name and renamed into place.

Definitions as in the lot job (:mod:`pipeline.lotjob`, :mod:`pipeline.lot`): a unit passes
when its worst in-band return loss is ``>= spec``; with a shared network the per-unit
worst RL is the one the lot job stored with the network choice (the numbers its yield
came from).
"""

from __future__ import annotations

import datetime as _dt
import math
import os
import re
import uuid
from dataclasses import dataclass
from html import escape
from pathlib import Path
from typing import Sequence

import numpy as np

import pipeline
from pipeline import metrics
from pipeline import report_figures as figures
from pipeline.elements import Element
from pipeline.errors import ConfigError, StoreError
from pipeline.headroom import summarise_lot
from pipeline.match import predicted_gamma
from pipeline.plots import element_text
from pipeline.store import ResultsStore, UnitRecord, settings_hash
from pipeline.units import format_si

DEFAULT_UNIT_PLOTS = 40
"""Units of a lot that get a section with plots (the lowest return loss first)."""

_UNIT_SYMBOL = {"inductor": "H", "capacitor": "F", "resistor": "Ω"}

VERDICT_SHORT = {
    "at_limit": "at limit", "some_room": "some room", "room": "room", "too_narrow": "too narrow",
    "beats_estimate": "beats estimate", "single_frequency": "single freq.", "no_estimate": "no estimate",
}

VERDICT_WORDS = {
    "at_limit": "at the limit (within 1 dB)",
    "some_room": "some room (1–3 dB)",
    "room": "room for a better network (> 3 dB)",
    "too_narrow": "antenna too narrow-band for the spec",
    "beats_estimate": "beats the estimate (Q model does not fit)",
    "single_frequency": "single frequency (no limit)",
    "no_estimate": "no Q estimate",
}


# =========================================================================== the data

def _finite_or_nan(value) -> float:
    return float("nan") if value is None else float(value)


def _elements(items: Sequence[dict]) -> tuple[Element, ...]:
    """A network back from its stored JSON list (interfaces.md shape)."""
    return tuple(Element.from_dict(d) for d in items)


@dataclass(frozen=True, eq=False)
class UnitView:
    """One stored unit as the report shows it.

    record             : the stored record (traces, metrics, headroom, provenance).
    elements           : the unit's own network, source -> load.
    shared_s11         : (N,) Gamma over the sweep with the lot's shared network, or None.
    shared_worst_rl_db : worst in-band RL with the shared network, dB (NaN without one).
    """

    record: UnitRecord
    elements: tuple[Element, ...]
    shared_s11: np.ndarray | None = None
    shared_worst_rl_db: float = float("nan")

    @property
    def band_hz(self) -> tuple[float, float]:
        return (self.record.band_lo_hz, self.record.band_hi_hz)

    @property
    def in_band(self) -> np.ndarray:
        lo, hi = self.band_hz
        return (self.record.freq_hz >= lo) & (self.record.freq_hz <= hi)

    @property
    def after_rl_db(self) -> float:
        """The worst in-band RL that decides pass/fail here: with the shared network when
        there is one, else with the unit's own network."""
        if self.shared_s11 is not None:
            return self.shared_worst_rl_db
        return self.record.rl_after_worst_db

    @property
    def passes(self) -> bool:
        return bool(self.after_rl_db >= self.record.spec_rl_db)

    @property
    def rl_bound_db(self) -> float | None:
        value = (self.record.headroom or {}).get("rl_bound_db")
        return None if value is None or not math.isfinite(value) else float(value)


@dataclass(frozen=True, eq=False)
class LotView:
    """A lot as the report shows it: its stored summary (None when the lot job did not
    analyse it), its units with the settings of that summary, the unreadable files."""

    lot: str
    store_path: str
    summary: dict | None
    settings: dict
    units: tuple[UnitView, ...]
    failures: tuple[tuple[str, str], ...]
    shared_elements: tuple[Element, ...] | None
    n_other_settings: int

    @property
    def spec_rl_db(self) -> float:
        return float(self.settings.get("spec_rl_db", float("nan")))

    @property
    def band_hz(self) -> tuple[float, float]:
        lo, hi = self.settings.get("band_hz", (float("nan"), float("nan")))
        return float(lo), float(hi)

    @property
    def z0_ohm(self) -> float:
        return float(self.settings.get("z0_ohm", 50.0))


def _shared_curve(record: UnitRecord, elements: tuple[Element, ...]) -> np.ndarray:
    """Gamma over the record's sweep with ``elements`` in front of its de-embedded load."""
    s = record.s11_dut
    z_load = record.z0_ohm * (1 + s) / (1 - s)
    return predicted_gamma(elements, record.freq_hz, z_load, record.z0_ohm)


def _unit_view(record: UnitRecord, shared: tuple[Element, ...] | None,
               shared_worst: dict[str, float]) -> UnitView:
    elements = _elements(record.elements)
    if shared is None:
        return UnitView(record, elements)
    curve = _shared_curve(record, shared)
    worst = shared_worst.get(record.dut_id)
    if worst is None:                                   # stored after the lot was analysed
        lo, hi = record.band_lo_hz, record.band_hi_hz
        inside = (record.freq_hz >= lo) & (record.freq_hz <= hi)
        worst = float(np.min(metrics.return_loss_db(curve[inside])))
    return UnitView(record, elements, curve, float(worst))


def choose_lot(store: ResultsStore, lot: str | None) -> str:
    """``lot`` if the store knows it; with None, the store's only lot."""
    lots = store.lots()
    if lot is not None:
        if lot not in lots:
            known = ", ".join(lots) if lots else "none"
            raise StoreError(f"no lot {lot!r} in the store (lots: {known})", where=str(store.path))
        return lot
    if not lots:
        raise StoreError("the store holds no lot", where=str(store.path))
    if len(lots) > 1:
        raise StoreError(f"the store holds {len(lots)} lots ({', '.join(lots)}): choose one "
                         "with --lot", where=str(store.path))
    return lots[0]


def load_lot(store: ResultsStore, lot: str | None = None) -> LotView:
    """Read a lot back: its summary, every unit stored with the summary's settings (or,
    without a summary, with the settings of the latest unit), its unreadable files."""
    lot = choose_lot(store, lot)
    summary = store.get_lot(lot)
    frame = store.units_frame(lot=lot)
    if summary is not None and "settings" in summary:
        settings = summary["settings"]
        digest = settings_hash(settings)
    elif len(frame):
        latest = store.get_unit(int(frame.index[np.argmax(frame["processed_at"].to_numpy())]))
        settings, digest = latest.config, latest.settings_hash
    else:
        settings, digest = {}, ""
    keep = frame["settings_hash"] == digest
    shared_dict = (summary or {}).get("shared")
    shared = _elements(shared_dict["elements"]) if shared_dict else None
    shared_worst = dict(zip(shared_dict["unit_ids"], shared_dict["worst_rl_db"])) if shared_dict else {}
    records = store.get_units(frame.index[keep])
    units = tuple(_unit_view(record, shared, shared_worst) for record in records)
    failures = store.failures_frame(lot=lot)
    return LotView(lot=lot, store_path=str(store.path), summary=summary, settings=settings,
                   units=units, failures=tuple(zip(failures["source"], failures["reason"])),
                   shared_elements=shared, n_other_settings=int((~keep).sum()))


def load_unit(store: ResultsStore, dut_id: str, lot: str | None = None) -> tuple[UnitView, dict | None]:
    """The latest record of ``dut_id`` (in ``lot`` if given) and its lot's summary, if any.

    The lot's shared network is applied when the summary was made with the unit's settings.
    """
    if lot is not None:
        choose_lot(store, lot)
    found = store.find(dut_id=dut_id, lot=lot)
    if not found:
        where = f" in lot {lot!r}" if lot is not None else ""
        raise StoreError(f"no unit {dut_id!r}{where} in the store", where=str(store.path))
    record = store.get_unit(found[-1])
    summary = store.get_lot(record.lot) if record.lot else None
    shared_dict = (summary or {}).get("shared")
    if shared_dict and settings_hash(summary.get("settings", {})) == record.settings_hash:
        worst = dict(zip(shared_dict["unit_ids"], shared_dict["worst_rl_db"]))
        return _unit_view(record, _elements(shared_dict["elements"]), worst), summary
    return _unit_view(record, None, {}), summary


# =========================================================================== formatting

def _db(value: float, digits: int = 1) -> str:
    return "–" if value is None or not math.isfinite(value) else f"{value:.{digits}f}"


def _pct(fraction: float | None) -> str:
    if fraction is None or not math.isfinite(fraction):
        return "–"
    percent = 100 * fraction
    return f"{percent:.0f} %" if percent in (0.0, 100.0) else f"{percent:.1f} %"


def _vswr_of_rl(rl_db: float) -> str:
    if rl_db is None or not math.isfinite(rl_db):
        return "–"
    return f"{float(metrics.vswr(metrics.gamma_from_return_loss(rl_db))):.2f}"


def _gamma_of_rl(rl_db: float) -> str:
    if rl_db is None or not math.isfinite(rl_db):
        return "–"
    return f"{float(metrics.gamma_from_return_loss(rl_db)):.3f}"


def _band_text(band_hz: tuple[float, float]) -> str:
    lo, hi = band_hz
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return "band unknown"
    if lo == hi:
        return f"at {format_si(lo, 'Hz', 4)}"
    return f"{format_si(lo, 'Hz', 4)} – {format_si(hi, 'Hz', 4)}"


def _spec_text(spec_rl_db: float) -> str:
    """``RL ≥ 10 dB (VSWR ≤ 1.92, |Γ| ≤ 0.316)``."""
    if not math.isfinite(spec_rl_db):
        return "spec unknown"
    return (f"RL ≥ {spec_rl_db:g} dB (VSWR ≤ {_vswr_of_rl(spec_rl_db)}, "
            f"|Γ| ≤ {_gamma_of_rl(spec_rl_db)})")


def _yield_tone(fraction: float | None) -> str:
    """Card accent for a yield: green from 95 %, warm from 80 %, red below."""
    if fraction is None or not math.isfinite(fraction):
        return "neutral"
    return "ok" if fraction >= 0.95 else "warm" if fraction >= 0.8 else "bad"


def _safe_file_stem(name: str) -> str:
    """A file name from an id: letters, digits, '.', '_' and '-' kept, the rest '_'."""
    stem = re.sub(r"[^A-Za-z0-9._-]", "_", name).strip(".") or "report"
    return stem[:120]


def _deviation_text(deviation: float, element: Element) -> str:
    """``±0.34 nH``: a part's tolerance in the SI prefix of its own value (6.8 nH)."""
    exponent = int(math.floor(math.log10(abs(element.value)) / 3) * 3)
    prefixed_unit = format_si(element.value, _UNIT_SYMBOL[element.kind]).split(" ")[1]   # "nH"
    return f"±{deviation / 10 ** exponent:.2g} {prefixed_unit}"


def _network_short(elements: Sequence[Element]) -> str:
    return " · ".join(element_text(e) for e in elements) or "none needed"


# =========================================================================== HTML pieces

CSS = """
:root{--ink:#2b3440;--muted:#6b7785;--paper:#f4f2ec;--card:#fff;--rule:#e3e6e9;
--before:#c0735a;--after:#2f6f8f;--fail:#c22f4b;--pass:#4f7f4e;--series:#5b8c5a;
--shunt:#8a6fb0;--band:#e3ecf2;--other:#b7892a;--mast:#1f2d39}
*{box-sizing:border-box}
html{-webkit-text-size-adjust:100%}
body{margin:0;background:var(--paper);color:var(--ink);
font:15px/1.55 system-ui,-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
font-variant-numeric:tabular-nums}
.wrap{max-width:1240px;margin:0 auto;padding:0 28px}
header.mast{background:var(--mast);color:#f1efe8;padding:26px 0 52px;
border-bottom:4px solid var(--after)}
.kicker{text-transform:uppercase;letter-spacing:.16em;font-size:12px;color:#9fb6c6;margin:0}
.kicker b{color:#f1efe8;font-weight:700;letter-spacing:.2em}
h1{font-size:40px;line-height:1.1;margin:6px 0 10px;font-weight:750;letter-spacing:-.015em;
overflow-wrap:anywhere}
.meta{color:#c6d1da;font-size:14px;margin:0}
.meta span+span:before{content:"·";margin:0 .55em;color:#6f8697}
.cards{display:grid;grid-template-columns:repeat(4,minmax(0,1fr));gap:16px;margin-top:-34px}
.card.wide{grid-column:span 2}
@media (max-width:1020px){.cards{grid-template-columns:repeat(2,minmax(0,1fr))}}
@media (max-width:560px){.cards{grid-template-columns:1fr}.card.wide{grid-column:auto}}
.card{background:var(--card);border-radius:12px;padding:16px 18px 15px;
box-shadow:0 1px 2px rgba(31,45,57,.08),0 6px 20px rgba(31,45,57,.07);border-top:4px solid var(--after)}
.card.wide{border-top-color:var(--shunt)}.card.warm{border-top-color:var(--before)}
.card.bad{border-top-color:var(--fail)}
.card.ok{border-top-color:var(--pass)}.card.neutral{border-top-color:#9aa5b1}
.label{font-size:11.5px;text-transform:uppercase;letter-spacing:.1em;color:var(--muted);
font-weight:600;margin:0}
.big{font-size:34px;font-weight:750;line-height:1.15;margin:6px 0 4px;letter-spacing:-.01em;
white-space:nowrap}
.big .from{color:var(--before)}.big .to{color:var(--after)}.big .bad{color:var(--fail)}
.big .arrow{color:#a3adb7;font-weight:400;margin:0 .18em}
.big small{font-size:18px;font-weight:600;color:var(--muted)}
.sub{font-size:13px;color:var(--muted);margin:0}
.chain{display:flex;flex-wrap:wrap;align-items:center;gap:0;margin:8px 0 6px}
.node{font-size:12px;text-transform:uppercase;letter-spacing:.08em;padding:4px 9px;
border-radius:999px;background:#e9edf1;color:var(--ink);font-weight:600}
.wire{width:12px;height:2px;background:#9aa5b1}
.part{display:inline-flex;flex-direction:column;padding:3px 10px 4px;border-radius:8px;
border:2px solid var(--series);line-height:1.15;background:#fff}
.part.shunt{border-color:var(--shunt)}
.part small{font-size:10.5px;color:var(--muted);text-transform:uppercase;letter-spacing:.06em}
.part b{font-size:17px;white-space:nowrap}
main section{margin:38px 0}
h2{font-size:23px;margin:0 0 2px;letter-spacing:-.01em}
h3{font-size:18px;margin:0}
.lede{color:var(--muted);margin:0 0 14px;max-width:74ch}
.panel{background:var(--card);border-radius:12px;padding:14px 16px;
box-shadow:0 1px 2px rgba(31,45,57,.07)}
.row{display:grid;gap:16px;align-items:start}
.row.two{grid-template-columns:minmax(0,5fr) minmax(0,6fr)}
.stack{display:grid;gap:16px}
.row.even{grid-template-columns:1fr 1fr}
@media (max-width:900px){.row.two,.row.even{grid-template-columns:1fr}}
figure{margin:0}
figure img{max-width:100%;height:auto;display:block;margin:0 auto}
figcaption{font-size:13px;color:var(--muted);margin-top:6px}
table{border-collapse:collapse;width:100%;font-size:13.5px}
th{text-align:left;font-weight:650;color:var(--muted);font-size:11.5px;text-transform:uppercase;
letter-spacing:.06em;border-bottom:2px solid var(--rule);padding:8px 10px;background:var(--card);
position:sticky;top:0;vertical-align:bottom}
td{padding:6px 10px;border-bottom:1px solid var(--rule);vertical-align:top}
td.num,th.num{text-align:right;white-space:nowrap}
table.units td{white-space:nowrap}
tr.fail td{background:#fcf0f2}
tr.fail td:first-child{box-shadow:inset 3px 0 0 var(--fail)}
.scroll{max-height:min(72vh,760px);overflow:auto;border-radius:12px;background:var(--card);
box-shadow:0 1px 2px rgba(31,45,57,.07)}
.badge{display:inline-block;padding:1px 9px;border-radius:999px;font-size:12px;font-weight:650;
white-space:nowrap}
.badge.fail{background:var(--fail);color:#fff}.badge.pass{background:#e2eee1;color:var(--pass)}
.mono,code{font-family:ui-monospace,"SFMono-Regular",Menlo,Consolas,"Liberation Mono",monospace;
font-size:12.5px}
code{background:#edf0f3;padding:1px 5px;border-radius:4px;overflow-wrap:anywhere}
a{color:var(--after)}a:hover{color:var(--ink)}
.note{border-left:4px solid var(--other);background:#fbf5e6;padding:9px 14px;border-radius:0 8px 8px 0;
font-size:14px;margin:12px 0}
.bars{display:grid;grid-template-columns:max-content 1fr max-content;gap:6px 12px;align-items:center;
font-size:13.5px}
.bar{height:10px;border-radius:5px;background:var(--after);min-width:2px}
dl.facts{display:grid;grid-template-columns:max-content 1fr;gap:4px 16px;margin:10px 0 0;font-size:13.5px}
dl.facts dt{color:var(--muted)}dl.facts dd{margin:0;overflow-wrap:anywhere}
.unit{background:var(--card);border-radius:12px;padding:16px 18px;margin:18px 0;
box-shadow:0 1px 2px rgba(31,45,57,.07);border-left:5px solid var(--pass)}
.unit.fail{border-left-color:var(--fail)}
.unit img{max-width:100%;height:auto;display:block}
.unit header{display:flex;flex-wrap:wrap;gap:10px 16px;align-items:baseline;margin-bottom:8px}
.unit .back{margin-left:auto;font-size:13px}
.verdict{font-size:14px;margin:8px 0 0}
footer{color:var(--muted);font-size:13px;padding:24px 0 56px;border-top:1px solid var(--rule);
margin-top:40px}
@media print{.scroll{max-height:none;overflow:visible}header.mast{padding-bottom:20px}
.cards{margin-top:12px}.unit{break-inside:avoid}}
"""

CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; "
       "form-action 'none'")


def _page(title: str, body: str) -> str:
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"<meta http-equiv=\"Content-Security-Policy\" content=\"{CSP}\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        f"<meta name=\"generator\" content=\"matchbay {escape(pipeline.__version__)}\">\n"
        f"<title>{escape(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")


def _img(picture: figures.Picture, alt: str) -> str:
    return (f'<img src="{picture.uri}" width="{picture.width}" height="{picture.height}" '
            f'alt="{escape(alt)}">')


def _figure_html(picture: figures.Picture | None, alt: str, caption: str) -> str:
    if picture is None:
        return ""
    return f"<figure class=\"panel\">{_img(picture, alt)}<figcaption>{caption}</figcaption></figure>"


def _card(label: str, big: str, sub: str, tone: str = "") -> str:
    return (f'<div class="card {tone}"><p class="label">{label}</p><div class="big">{big}</div>'
            f'<p class="sub">{sub}</p></div>')


def _chain_html(elements: Sequence[Element]) -> str:
    """radio ─ [shunt inductor 6.2 nH] ─ [series capacitor 18 pF] ─ antenna, as chips."""
    parts = ['<span class="node">radio</span>']
    for e in elements:
        value = format_si(e.value, _UNIT_SYMBOL[e.kind])
        parts.append('<span class="wire"></span>')
        parts.append(f'<span class="part {escape(e.position)}"><small>{escape(e.position)} '
                     f'{escape(e.kind)}</small><b>{escape(value)}</b></span>')
    parts.append('<span class="wire"></span><span class="node">antenna</span>')
    return f'<div class="chain">{"".join(parts)}</div>'


def _from_to(before: str, after: str, bad: bool = False) -> str:
    return (f'<span class="from">{before}</span><span class="arrow">→</span>'
            f'<span class="{"bad" if bad else "to"}">{after}</span>')


def _masthead(kind: str, title: str, meta: Sequence[str]) -> str:
    items = "".join(f"<span>{m}</span>" for m in meta)
    return (f'<header class="mast"><div class="wrap"><p class="kicker"><b>matchbay</b> · {kind}</p>'
            f'<h1>{escape(title)}</h1><p class="meta">{items}</p></div></header>')


def _footer(store_path: str, settings: dict) -> str:
    parts = settings.get("parts") or {}
    fixture = settings.get("fixture") or []
    steps = "; ".join(", ".join(f"{k} {v}" for k, v in step.items() if v is not None)
                      for step in fixture) or "none"
    now = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    return (
        '<footer><div class="wrap">'
        f"<p>Made by matchbay {escape(pipeline.__version__)} on {escape(now)} from the store "
        f"<code>{escape(store_path)}</code>. Part library {escape(str(parts.get('name', '–')))}: "
        f"{escape(str(parts.get('description', '')))}; parts series "
        f"{escape(str(settings.get('series', '–')))}; fixture removed: {escape(steps)}; "
        f"reference impedance {escape(str(settings.get('z0_ohm', '–')))} Ω.</p>"
        "<p>Return loss RL = −20·log10|Γ| (positive dB, higher is better); VSWR = (1+|Γ|)/(1−|Γ|); "
        "Γ is S11 at the reference impedance. Values after matching are predictions from the "
        "measured S11 and the part models: confirm them on the bench with the parts fitted, "
        "and keep the analyzer port within its limits (no DC, ESD precautions, input power).</p>"
        "</div></footer>")


# =========================================================================== lot report

def _units_arrays(units: Sequence[UnitView]) -> dict:
    return {
        "before": np.array([u.record.rl_before_worst_db for u in units]),
        "own": np.array([u.record.rl_after_worst_db for u in units]),
        "after": np.array([u.after_rl_db for u in units]),
        "passes": np.array([u.passes for u in units], dtype=bool),
    }


def _lot_cards(view: LotView, arrays: dict) -> str:
    summary = view.summary or {}
    n = len(view.units)
    spec = view.spec_rl_db
    shared = summary.get("shared")
    cards = []
    y_before = float(np.mean(arrays["before"] >= spec)) if n else None
    y_own = float(np.mean(arrays["own"] >= spec)) if n else None
    if shared:
        y_after = float(np.mean(arrays["passes"])) if n else None
        n_pass = int(arrays["passes"].sum())
        tone = _yield_tone(y_after)
        cards.append(_card("Yield at the spec", _from_to(_pct(y_before), _pct(y_after), tone == "bad"),
                           f"as measured → with the shared network: {n_pass} of {n} units reach "
                           f"RL ≥ {spec:g} dB over {escape(_band_text(view.band_hz))}",
                           tone))
        cards.append(_card("Shared network: one set of parts for the whole lot",
                           _chain_html(view.shared_elements),
                           f"{escape(str(shared.get('series', '')))} values · arrangement "
                           f"{escape(str(shared.get('topology', '')))} · median worst-case RL "
                           f"{_db(shared.get('median_worst_rl_db'))} dB with it", "wide"))
    else:
        cards.append(_card("Yield at the spec", _from_to(_pct(y_before), _pct(y_own)),
                           "as measured → each unit with its own network (no shared network "
                           f"stored for this lot); spec {escape(_spec_text(spec))}", "warm"))
    tolerance = summary.get("tolerance")
    if tolerance:
        spread = " / ".join(_deviation_text(t, e) for t, e in
                            zip(tolerance.get("tolerance", []), view.shared_elements or ()))
        cards.append(_card("Tolerance yield of the shared network", _pct(tolerance["yield_fraction"]),
                           f"{tolerance['confidence'] * 100:.0f} % interval "
                           f"{_pct(tolerance['ci_low'])} – {_pct(tolerance['ci_high'])} · "
                           f"{tolerance['n_trials']} Monte Carlo trials, parts {escape(spread)} "
                           f"({escape(str(tolerance.get('distribution', '')))})",
                           _yield_tone(tolerance["yield_fraction"])))
    if n:
        before_med = float(np.median(arrays["before"]))
        after_med = float(np.median(arrays["after"]))
        cards.append(_card("Worst in-band return loss, median",
                           _from_to(_db(before_med), f"{_db(after_med)}<small> dB</small>"),
                           f"VSWR {_vswr_of_rl(before_med)} → {_vswr_of_rl(after_med)} · |Γ| "
                           f"{_gamma_of_rl(before_med)} → {_gamma_of_rl(after_med)}"
                           + (" · with the shared network" if shared else ""), "neutral"))
        if shared:
            cards.append(_card("Each unit with its own network", _pct(y_own),
                               f"the ceiling if every unit were tuned alone: median "
                               f"{_db(float(np.median(arrays['own'])))} dB, worst "
                               f"{_db(float(np.min(arrays['own'])))} dB", "neutral"))
        q = np.array([_finite_or_nan((u.record.headroom or {}).get("q_estimate")) for u in view.units])
        bound = np.array([_finite_or_nan((u.record.headroom or {}).get("rl_bound_db")) for u in view.units])
        if np.isfinite(q).any():
            cards.append(_card("Load Q, median", f"{np.nanmedian(q):.3g}",
                               "at the band centre · Bode–Fano bound, median "
                               f"{_db(float(np.nanmedian(bound)) if np.isfinite(bound).any() else None)} dB "
                               "(the best any lossless network could do)", "neutral"))
    n_bad_files = len(view.failures)
    unreadable = f" <small>+ {n_bad_files} unreadable</small>" if n_bad_files else ""
    cards.append(_card("Units", f"{n}{unreadable}",
                       "stored and matched"
                       + (f"; {n_bad_files} file(s) could not be read (listed below)" if n_bad_files else "")
                       + (f"; {view.n_other_settings} more stored with other settings (not shown)"
                          if view.n_other_settings else ""),
                       "bad" if n_bad_files else "neutral"))
    return f'<div class="cards">{"".join(cards)}</div>'


def _stale_note(view: LotView) -> str:
    summary = view.summary
    if summary is None:
        return ('<p class="note">No lot summary is stored for this lot (the lot job did not '
                'analyse it): there is no shared network; "after" means each unit with its own '
                'network. Run <code>matchbay lot</code> on the lot to choose one.</p>')
    if summary.get("n_units") != len(view.units):
        return (f'<p class="note">The stored lot summary covers {summary.get("n_units")} units; '
                f'the store now holds {len(view.units)} with its settings. The shared network '
                'and its yield are those of the summary; rerun the lot job to refresh them.</p>')
    return ""


def _shared_section(view: LotView) -> str:
    summary = view.summary or {}
    shared = summary.get("shared")
    if not shared:
        return ""
    rows = []
    for t in shared.get("per_topology", []):
        chosen = t.get("topology") == shared.get("topology")
        mark = ' <span class="badge pass">chosen</span>' if chosen else ""
        elements = _elements(t.get("elements", []))
        rows.append(
            f'<tr><td>{escape(str(t.get("topology", "")))}{mark}</td>'
            f'<td>{escape(_network_short(elements))}</td>'
            f'<td class="num">{int(t.get("n_pass", 0))}</td>'
            f'<td class="num">{_pct(t.get("yield_fraction"))}</td>'
            f'<td class="num">{_db(t.get("median_worst_rl_db"))}</td>'
            f'<td class="num">{int(t.get("n_candidates", 0))}</td></tr>')
    return (
        '<section id="shared"><h2>The shared network</h2>'
        '<p class="lede">One set of standard-valued parts for every unit of the lot, chosen to pass '
        'the most units (ties: the larger median worst-case return loss). Elements run from the '
        'radio (source port) to the antenna. The best network of each arrangement tried:</p>'
        '<div class="scroll" style="max-height:none"><table><thead><tr><th>Arrangement</th><th>Parts</th>'
        '<th class="num">Units passing</th><th class="num">Yield</th>'
        '<th class="num">Median worst RL (dB)</th><th class="num">Candidates scored</th></tr></thead>'
        f'<tbody>{"".join(rows)}</tbody></table></div></section>')


def _yield_table(view: LotView, arrays: dict) -> str:
    """Yield at the spec as measured, with the shared network (nominal parts and within
    tolerance), and with each unit's own network."""
    spec = view.spec_rl_db
    summary = view.summary or {}
    rows = [("As measured", arrays["before"])]
    if view.shared_elements is not None:
        rows.append(("With the shared network", arrays["after"]))
    rows.append(("Each unit with its own network", arrays["own"]))
    html_rows = [f'<tr><td>{name}</td><td class="num">{int(np.sum(v >= spec))} / {v.size}</td>'
                 f'<td class="num"><b>{_pct(float(np.mean(v >= spec)))}</b></td>'
                 f'<td class="num">{_db(float(np.median(v)))}</td>'
                 f'<td class="num">{_db(float(np.min(v)))}</td></tr>'
                 for name, v in rows]
    tolerance = summary.get("tolerance")
    if tolerance:
        html_rows.insert(2, (
            f'<tr><td>Shared network, parts within tolerance<br><small class="sub">'
            f'{tolerance["n_trials"]} Monte Carlo trials, {_pct(tolerance["ci_low"])} – '
            f'{_pct(tolerance["ci_high"])} at {tolerance["confidence"] * 100:.0f} %</small></td>'
            f'<td class="num">{tolerance["n_pass"]} / {tolerance["n_trials"]}</td>'
            f'<td class="num"><b>{_pct(tolerance["yield_fraction"])}</b></td>'
            f'<td class="num">{_db(tolerance.get("median_worst_rl_db"))}</td><td class="num">–</td></tr>'))
    return ('<div class="panel"><p class="label" style="margin-bottom:6px">Yield at the spec</p>'
            '<table><thead><tr><th></th><th class="num">Pass</th><th class="num">Yield</th>'
            '<th class="num">Median RL</th><th class="num">Worst RL</th></tr></thead>'
            f'<tbody>{"".join(html_rows)}</tbody></table>'
            f'<p class="sub" style="margin-top:8px">Worst-case return loss in dB inside the band; '
            f'a unit passes at {escape(_spec_text(spec))}.</p></div>')


def _in_band(gamma: np.ndarray, unit: UnitView) -> np.ndarray:
    return gamma[unit.in_band]


def _lot_figures(view: LotView, arrays: dict) -> str:
    units = view.units
    if not units:
        return '<p class="note">No unit of this lot could be stored: nothing to plot.</p>'
    spec = view.spec_rl_db
    has_shared = view.shared_elements is not None
    after_label = "with the shared network" if has_shared else "with its own network"
    after_gammas = [u.shared_s11 if has_shared else u.record.s11_matched for u in units]
    failing = ~arrays["passes"]
    hist = figures.rl_histogram(arrays["before"], arrays["after"] if has_shared else None,
                                arrays["own"], spec)
    smith = figures.lot_smith([_in_band(u.record.s11_dut, u) for u in units],
                              [_in_band(g, u) for g, u in zip(after_gammas, units)], failing, spec,
                              after_label)
    curves = figures.rl_curves([u.record.freq_hz for u in units], [u.record.s11_dut for u in units],
                               after_gammas, failing, view.band_hz, spec, after_label)
    band = escape(_band_text(view.band_hz))
    return (
        '<section id="return-loss"><h2>Return loss across the lot</h2>'
        f'<p class="lede">Worst-case (smallest) return loss inside {band} per unit, before and '
        f'after; every unit\'s curve; and every unit\'s in-band S11 on the Smith chart. Spec: '
        f'{escape(_spec_text(spec))}.</p>'
        '<div class="row two">'
        + _figure_html(smith, "Smith chart of every unit with and without the shared network",
                       f"Smith chart: in-band S11 of every unit, as measured and {escape(after_label)}. "
                       "Inside the dotted circle the return loss meets the spec.")
        + '<div class="stack">'
        + _figure_html(hist, "Histogram of worst-case return loss before and after",
                       "Worst in-band return loss per unit. Shaded: meets the spec.")
        + _yield_table(view, arrays)
        + '</div></div><div style="height:16px"></div>'
        + _figure_html(curves, "Return-loss curves of every unit, band shaded",
                       f"Return loss over the sweep, band shaded; VSWR on the right axis. "
                       f"Red: units that miss the spec {escape(after_label)}.")
        + '</section>')


def _headroom_section(view: LotView) -> str:
    with_headroom = [u for u in view.units if u.record.headroom]
    if not with_headroom:
        return ""
    stats = summarise_lot(u.record.headroom for u in with_headroom)
    picture = figures.headroom_figure(np.array([_finite_or_nan(u.record.headroom.get("q_estimate"))
                                                for u in with_headroom]),
                                      np.array([_finite_or_nan(u.record.headroom.get("headroom_db"))
                                                for u in with_headroom]))
    rows = []
    for key, name, form in (("q_estimate", "Q at the band centre", "{:.3g}"),
                            ("rl_bound_db", "Bode–Fano bound (dB)", "{:.1f}"),
                            ("headroom_db", "Headroom (dB)", "{:.1f}")):
        s = stats.get(key)
        cells = "".join(f'<td class="num">{form.format(s[k])}</td>' if s else '<td class="num">–</td>'
                        for k in ("min", "p10", "median", "p90", "max"))
        rows.append(f"<tr><td>{name}</td>{cells}<td class=\"num\">{s['count'] if s else 0}</td></tr>")
    counts = stats["verdicts"]
    top = max(counts.values()) if counts else 1
    bars = "".join(
        f'<span>{escape(VERDICT_WORDS.get(code, code))}</span>'
        f'<span><span class="bar" style="display:block;width:{100 * n / top:.1f}%"></span></span>'
        f'<span class="mono">{n}</span>' for code, n in sorted(counts.items(), key=lambda kv: -kv[1]))
    rough = stats["rough_estimates"]
    return (
        '<section id="headroom"><h2>Q and matching headroom</h2>'
        '<p class="lede">Q of each load from its impedance (Yaghjian and Best, 2005) and the '
        'Bode–Fano limit for that Q over the band: the best worst-case return loss any lossless '
        'network could reach. Headroom is that limit minus what the unit\'s own two-part network '
        'achieves.</p>'
        + _figure_html(picture, "Histograms of Q and of the matching headroom across the lot",
                       "Spread across the lot; dashed: the median.")
        + '<div class="row even" style="margin-top:16px"><div class="panel"><table><thead><tr><th></th>'
        '<th class="num">min</th><th class="num">10 %</th><th class="num">median</th>'
        '<th class="num">90 %</th><th class="num">max</th><th class="num">units</th></tr></thead>'
        f'<tbody>{"".join(rows)}</tbody></table></div>'
        f'<div class="panel"><p class="label" style="margin-bottom:8px">Verdicts</p>'
        f'<div class="bars">{bars}</div>'
        + (f'<p class="sub" style="margin-top:8px">{rough} rough estimates (the single-resonance '
           'model is only a guide there).</p>' if rough else "")
        + '</div></div></section>')


def _unit_row(u: UnitView, anchor: str | None, has_shared: bool) -> str:
    r = u.record
    name = escape(r.dut_id)
    link = f'<a href="#{anchor}">{name}</a>' if anchor else name
    badge = '<span class="badge pass">pass</span>' if u.passes else '<span class="badge fail">fail</span>'
    verdict = VERDICT_SHORT.get(str((r.headroom or {}).get("verdict_code", "")), "–")
    shared_cells = (f'<td class="num">{_db(u.shared_worst_rl_db)}</td>'
                    f'<td class="num">{_vswr_of_rl(u.shared_worst_rl_db)}</td>') if has_shared else ""
    return (f'<tr class="{"pass" if u.passes else "fail"}"><td>{link}</td><td>{badge}</td>'
            f'<td class="num">{_db(r.rl_before_worst_db)}</td>{shared_cells}'
            f'<td class="num">{_db(r.rl_after_worst_db)}</td>'
            f'<td class="num">{_db((r.headroom or {}).get("q_estimate"))}</td>'
            f'<td class="num">{_db((r.headroom or {}).get("headroom_db"))}</td>'
            f'<td>{escape(verdict)}</td><td class="mono">{escape(_network_short(u.elements))}</td></tr>')


def _table_order(units: Sequence[UnitView]) -> list[int]:
    """Failing units first (lowest return loss first), then the passing ones by name."""
    failing = sorted((i for i, u in enumerate(units) if not u.passes), key=lambda i: units[i].after_rl_db)
    passing = sorted((i for i, u in enumerate(units) if u.passes), key=lambda i: units[i].record.dut_id)
    return failing + passing


def plotted_units(units: Sequence[UnitView], limit: int) -> list[int]:
    """Indices of the units that get a section with plots: the ``limit`` lowest return
    losses after matching (so failing units first), lowest first."""
    order = sorted(range(len(units)), key=lambda i: (units[i].passes, units[i].after_rl_db))
    return order[:max(0, limit)]


def _anchor(u: UnitView) -> str:
    return f"unit-{u.record.index}"


def _units_section(view: LotView, plotted: list[int]) -> str:
    units = view.units
    has_shared = view.shared_elements is not None
    anchors = {i: _anchor(units[i]) for i in plotted}
    rows = "".join(_unit_row(units[i], anchors.get(i), has_shared) for i in _table_order(units))
    shared_heads = ('<th class="num">RL shared<br>dB</th><th class="num">VSWR<br>shared</th>'
                    if has_shared else "")
    n_fail = sum(not u.passes for u in units)
    which = "with the shared network" if has_shared else "with its own network"
    return (
        '<section id="units"><h2>Units</h2>'
        f'<p class="lede">All {len(units)} units, failing ones first ({n_fail} failing {which}, '
        'lowest return loss first; then the rest by name). RL is the worst-case return loss inside '
        'the band; headroom is the Bode–Fano bound minus the unit\'s own network. A linked name has '
        'its own section with plots below.</p>'
        '<div class="scroll"><table class="units"><thead><tr><th>Unit</th><th>Status</th>'
        f'<th class="num">RL before<br>dB</th>{shared_heads}<th class="num">RL own<br>dB</th>'
        '<th class="num">Q</th><th class="num">Headroom<br>dB</th><th>Bode–Fano</th>'
        f'<th>Own network, radio → antenna</th></tr></thead><tbody>{rows}</tbody></table></div></section>')


def _failures_section(view: LotView) -> str:
    if not view.failures:
        return ""
    rows = "".join(f'<tr><td class="mono">{escape(str(source))}</td><td>{escape(str(reason))}</td></tr>'
                   for source, reason in view.failures)
    return ('<section id="unreadable"><h2>Files that could not be processed</h2>'
            f'<p class="lede">{len(view.failures)} file(s) of this lot were logged as failures '
            'and are not in the figures.</p>'
            f'<div class="scroll"><table><thead><tr><th>File</th><th>Reason</th></tr></thead>'
            f'<tbody>{rows}</tbody></table></div></section>')


def _unit_facts(u: UnitView) -> str:
    r = u.record
    hd = r.headroom or {}
    facts = [("Source", f"<code>{escape(r.source)}</code>"),
             ("Worst in-band RL",
              f"{_db(r.rl_before_worst_db)} dB before → {_db(r.rl_after_worst_db)} dB with its own "
              f"network (VSWR {_vswr_of_rl(r.rl_before_worst_db)} → {_vswr_of_rl(r.rl_after_worst_db)})"),
             ("Own network", escape(_network_short(u.elements)) + f" ({escape(r.topology)})")]
    if u.shared_s11 is not None:
        facts.append(("With the shared network",
                      f"{_db(u.shared_worst_rl_db)} dB (VSWR {_vswr_of_rl(u.shared_worst_rl_db)}, "
                      f"|Γ| {_gamma_of_rl(u.shared_worst_rl_db)})"))
    if hd:
        facts.append(("Q · Bode–Fano bound",
                      f"{_db(hd.get('q_estimate'))} · {_db(hd.get('rl_bound_db'))} dB "
                      f"(headroom {_db(hd.get('headroom_db'))} dB)"))
    items = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in facts)
    verdict = (f'<p class="verdict"><b>Bode–Fano, with its own network:</b> '
               f'{escape(str(hd.get("verdict")))}</p>' if hd.get("verdict") else "")
    return f'<dl class="facts">{items}</dl>{verdict}'


def _unit_figure(u: UnitView) -> figures.UnitFigure:
    r = u.record
    return figures.UnitFigure(r.freq_hz, r.s11_dut, r.s11_matched, u.band_hz, r.z0_ohm, u.elements,
                              title=r.dut_id, spec_rl_db=r.spec_rl_db, rl_bound_db=u.rl_bound_db,
                              shared_s11=u.shared_s11)


def _unit_block(u: UnitView, picture: figures.Picture, back: str) -> str:
    r = u.record
    badge = '<span class="badge pass">pass</span>' if u.passes else '<span class="badge fail">fail</span>'
    return (f'<article class="unit {"pass" if u.passes else "fail"}" id="{_anchor(u)}"><header>'
            f'<h3>{escape(r.dut_id)}</h3>{badge}<a class="back" href="#{back}">back to the table ↑</a>'
            f'</header>{_img(picture, f"Return loss and Smith chart of unit {r.dut_id}")}'
            f'{_unit_facts(u)}</article>')


def _unit_sections(view: LotView, plotted: list[int], pictures: list[figures.Picture],
                   limit: int) -> str:
    units = view.units
    if not units:
        return ""
    n_fail = sum(not u.passes for u in units)
    n_fail_plotted = sum(not units[i].passes for i in plotted)
    which = "with the shared network" if view.shared_elements is not None else "with their own network"
    if n_fail > n_fail_plotted:
        scope = (f"only the {n_fail_plotted} worst of the {n_fail} failing units have plots here; "
                 "the rest are in the table")
    else:
        scope = f"all {n_fail} failing units among them"
    note = (f'<p class="note">Plots for {len(plotted)} of {len(units)} units: those with the lowest '
            f'worst-case return loss {which} ({scope}). Every unit is in the table. '
            f'<code>matchbay report --unit-plots N</code> sets how many (now {limit}); '
            f'<code>--dut ID</code> makes the report of any one unit.</p>')
    blocks = "".join(_unit_block(units[i], picture, "units") for i, picture in zip(plotted, pictures))
    return ('<section id="unit-plots"><h2>Units in detail</h2>'
            '<p class="lede">Return loss before and after with the band shaded and the Bode–Fano '
            'bound dashed; on the Smith chart the load at the band centre, the move of each part '
            '(series parts along circles of constant resistance, shunt parts along circles of '
            'constant conductance) and the matched point.</p>'
            f'{note}{blocks}</section>')


def lot_report_html(view: LotView, *, unit_plots: int = DEFAULT_UNIT_PLOTS,
                    workers: int | None = None) -> str:
    """The whole HTML page of a lot report; unit figures are drawn on ``workers`` processes
    (default: all cores) while this process draws the lot figures."""
    arrays = _units_arrays(view.units)
    plotted = plotted_units(view.units, unit_plots)
    meta = [f"{len(view.units)} units", escape(_band_text(view.band_hz)),
            escape(_spec_text(view.spec_rl_db)), f"z0 {view.z0_ohm:g} Ω",
            f"{escape(str(view.settings.get('series', '–')))} parts"]
    with figures.unit_figures([_unit_figure(view.units[i]) for i in plotted], workers) as collect:
        lot_parts = (_lot_cards(view, arrays) + _stale_note(view) + _shared_section(view)
                     + _lot_figures(view, arrays) + _headroom_section(view))
        pictures = collect()
    body = (_masthead("lot report", view.lot, meta)
            + '<main class="wrap">' + lot_parts
            + _units_section(view, plotted) + _failures_section(view)
            + _unit_sections(view, plotted, pictures, unit_plots) + "</main>"
            + _footer(view.store_path, view.settings))
    return _page(f"Lot {view.lot} · matchbay", body)


# =========================================================================== unit report

def _shared_cards_for_unit(unit: UnitView, summary: dict) -> list[str]:
    """The unit with its lot's shared network, that network, and the lot's yield with it."""
    shared = summary["shared"]
    ok = unit.passes
    rl = unit.shared_worst_rl_db
    return [
        _card("With the lot's shared network", f"{_db(rl)}<small> dB</small>",
              f"{'passes' if ok else 'fails'} the spec · VSWR {_vswr_of_rl(rl)} · |Γ| {_gamma_of_rl(rl)}",
              "ok" if ok else "bad"),
        _card(f"Shared network of lot {escape(unit.record.lot)}",
              _chain_html(_elements(shared["elements"])),
              f"{escape(str(shared.get('series', '')))} values · arrangement "
              f"{escape(str(shared.get('topology', '')))}", "wide"),
        _card("Lot yield with it", _pct(shared.get("yield_fraction")),
              f"{shared.get('n_pass')} of {shared.get('n_units')} units of the lot pass",
              _yield_tone(shared.get("yield_fraction"))),
    ]


def unit_report_html(unit: UnitView, summary: dict | None, store_path: str) -> str:
    """The whole HTML page of one unit's report."""
    r = unit.record
    spec = r.spec_rl_db
    hd = r.headroom or {}
    before, own = r.rl_before_worst_db, r.rl_after_worst_db
    cards = [
        _card("Worst in-band return loss",
              _from_to(_db(before), f"{_db(own)}<small> dB</small>", own < spec),
              f"as measured → with its own network · VSWR {_vswr_of_rl(before)} → {_vswr_of_rl(own)}"
              f" · |Γ| {_gamma_of_rl(before)} → {_gamma_of_rl(own)}", "ok" if own >= spec else "bad"),
        _card("Its own network", _chain_html(unit.elements),
              f"{escape(r.series)} values · arrangement {escape(r.topology)}", "wide"),
    ]
    if hd:
        cards.append(_card("Bode–Fano bound", f"{_db(hd.get('rl_bound_db'))}<small> dB</small>",
                           f"Q {_db(hd.get('q_estimate'))} at the band centre · headroom "
                           f"{_db(hd.get('headroom_db'))} dB · "
                           f"{escape(VERDICT_WORDS.get(str(hd.get('verdict_code')), '–'))}", "neutral"))
    if unit.shared_s11 is not None:
        cards += _shared_cards_for_unit(unit, summary)
    picture = figures.unit_figure(_unit_figure(unit))
    meta = [f"lot {escape(r.lot or '–')}", escape(_band_text(unit.band_hz)), escape(_spec_text(spec)),
            f"z0 {r.z0_ohm:g} Ω"]
    provenance = [("Source", f"<code>{escape(r.source)}</code>"),
                  ("SHA-256", f"<code>{escape(r.source_sha256)}</code>"),
                  ("Serial", escape(r.serial or "–")), ("Acquired", escape(r.acquired_at or "–")),
                  ("Processed", escape(r.processed_at or "–")),
                  ("Made by", f"matchbay {escape(r.tool_version)}"),
                  ("Settings hash", f"<code>{escape(r.settings_hash)}</code>")]
    body = (_masthead("unit report", r.dut_id, meta) + '<main class="wrap">'
            + f'<div class="cards">{"".join(cards)}</div>'
            + '<section id="match"><h2>The match</h2><p class="lede">Return loss before and after '
            'with the band shaded, the spec dotted and the Bode–Fano bound dashed; the Smith chart '
            'shows the load at the band centre, the move of each part (series parts along circles '
            'of constant resistance, shunt parts along circles of constant conductance) and the '
            'matched point.</p>'
            + f'<figure class="panel">{_img(picture, f"Return loss and Smith chart of unit {r.dut_id}")}'
            + '</figure>' + _unit_facts(unit) + '</section>'
            + '<section id="provenance"><h2>Where it came from</h2><div class="panel"><dl class="facts">'
            + "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in provenance) + '</dl></div></section>'
            + "</main>" + _footer(store_path, r.config))
    return _page(f"Unit {r.dut_id} · matchbay", body)


# =========================================================================== writing

def _write_atomically(path: Path, text: str) -> Path:
    """Write ``text`` next to ``path`` under a temporary name, then rename it into place.

    The file gets the usual permissions (0666 less the umask): a report is meant to be shared.
    """
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        with open(tmp, "x", encoding="utf-8") as out:
            out.write(text)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _check_output_folder(folder: Path) -> None:
    """Fail before any work when ``folder`` cannot be the output folder (it is a file)."""
    if folder.exists() and not folder.is_dir():
        raise ConfigError("is not a folder", where=str(folder))


def _make_output_folder(folder: Path) -> Path:
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise ConfigError(f"cannot create the output folder: {error.strerror or error}",
                          where=str(folder)) from None
    return folder


def write_report(store_path: str | Path, out_dir: str | Path, *, lot: str | None = None,
                 dut: str | None = None, unit_plots: int = DEFAULT_UNIT_PLOTS,
                 workers: int | None = None) -> Path:
    """Write the report of a lot (or, with ``dut``, of one unit) into ``out_dir``; its path.

    The file is ``<lot>.html`` or ``<dut>.html`` (characters other than letters, digits,
    '.', '_' and '-' become '_'); ``out_dir`` is created when missing. A missing store,
    an unknown lot or unit raise :class:`~pipeline.errors.StoreError`, an output folder
    that is a file :class:`~pipeline.errors.ConfigError`; nothing is written then. The
    store is read first and closed before any drawing starts.
    """
    if unit_plots < 0:
        raise ConfigError(f"--unit-plots must be 0 or more, not {unit_plots}", where="--unit-plots")
    folder = Path(out_dir)
    _check_output_folder(folder)
    with ResultsStore(store_path, mode="r") as store:
        if dut is not None:
            unit, summary = load_unit(store, dut, lot)
        else:
            view = load_lot(store, lot)
    if dut is not None:
        stem, page = unit.record.dut_id, unit_report_html(unit, summary, str(store_path))
    else:
        stem, page = view.lot, lot_report_html(view, unit_plots=unit_plots, workers=workers)
    _make_output_folder(folder)
    try:
        return _write_atomically(folder / f"{_safe_file_stem(stem)}.html", page)
    except OSError as error:
        raise ConfigError(f"cannot write the report: {error.strerror or error}",
                          where=str(folder)) from None
