"""The closing summary of a lot, printed with rich (used by ``lot``, ``demo``, ``results``)."""

from __future__ import annotations

from rich.console import Console
from rich.table import Table

from pipeline.plots import network_text
from pipeline.elements import Element

MAX_LISTED = 12         # failing units / bad files listed by name before "... and N more"


def _pct(fraction: float) -> str:
    return f"{100 * fraction:.1f} %"


def _listing(names: list[str]) -> str:
    shown = ", ".join(names[:MAX_LISTED])
    more = len(names) - MAX_LISTED
    return shown + (f" … and {more} more" if more > 0 else "")


def print_lot_summary(summary: dict, console: Console) -> None:
    """Units, failures with reasons, RL before/after, yields, the shared network."""
    settings = summary["settings"]
    spec = settings["spec_rl_db"]
    lo, hi = (f / 1e6 for f in settings["band_hz"])
    run = summary.get("this_run")
    console.rule(f"[bold]lot {summary['lot']}[/]")
    console.print(f"band {lo:g}–{hi:g} MHz, spec {spec:g} dB return loss, {settings['series']} parts"
                  f" ({settings['parts']['name']}), fixture: "
                  f"{', '.join(s.get('type', '?') for s in settings['fixture']) or 'none'}")
    if run:
        console.print(f"this run: {run['stored']} stored, {run['failed']} failed, "
                      f"{run['skipped']} already in the store")
    console.print(f"units in the store: [bold]{summary['n_units']}[/]; "
                  f"files that could not be used: [bold]{summary['n_failed_files']}[/]")
    for failure in summary["failures"][:MAX_LISTED]:
        console.print(f"  [red]✗[/] {failure['reason']}", soft_wrap=True)
    if summary["n_units"] == 0:
        return
    table = Table(show_edge=False, header_style="bold", pad_edge=False)
    for column in ("", "RL median", "RL worst", f"yield at {spec:g} dB"):
        table.add_column(column, justify="right" if column else "left")
    table.add_row("before matching", f"{summary['rl_before_median_db']:.1f} dB",
                  f"{summary['rl_before_worst_db']:.1f} dB", _pct(summary["yield_before"]))
    table.add_row("each unit, own network", f"{summary['rl_after_median_db']:.1f} dB",
                  f"{summary['rl_after_worst_db']:.1f} dB", _pct(summary["yield_after_own"]))
    shared = summary.get("shared")
    if shared:
        worst = min(shared["worst_rl_db"])
        table.add_row("[bold]one shared network[/]", f"{shared['median_worst_rl_db']:.1f} dB",
                      f"{worst:.1f} dB", f"[bold]{_pct(shared['yield_fraction'])}[/]")
    console.print(table)
    if not shared:
        return
    console.print(f"shared network (BOM for the line): [bold]"
                  f"{network_text([Element.from_dict(e) for e in shared['elements']])}[/]")
    tol = summary.get("tolerance")
    if tol:
        console.print(f"with part tolerances ({tol['distribution']}, {tol['n_trials']} trials, seed "
                      f"{tol['seed']}): predicted production yield [bold]{_pct(tol['yield_fraction'])}[/] "
                      f"({int(100 * tol['confidence'])} % CI {_pct(tol['ci_low'])}–{_pct(tol['ci_high'])})")
    failing = shared["failing_unit_ids"]
    if failing:
        console.print(f"left failing by the shared network ({len(failing)}): {_listing(failing)}")
    headroom = summary.get("headroom")
    if headroom and headroom.get("q_estimate") and headroom.get("rl_bound_db"):
        q, bound = headroom["q_estimate"], headroom["rl_bound_db"]["median"]
        limit = ("above 40 dB: the antennas are not what limits the match" if bound > 40
                 else f"{bound:.1f} dB (median headroom {headroom['headroom_db']['median']:.1f} dB)")
        console.print(f"antenna Q across units: median {q['median']:.1f} (p10 {q['p10']:.1f}, "
                      f"p90 {q['p90']:.1f}); Bode–Fano limit over the band, median: {limit}")
    console.print("[dim]Predicted from measurements and part models; confirm on built boards. "
                  "Predictions do not replace compliance testing.[/]")
