"""A readable text summary of a ruleset, for ``tierwise rules check FILE``."""

from __future__ import annotations

from rules.model import Criterion, Thresholds
from rules.ruleset import Ruleset

__all__ = ["summary"]


def _thr(th: Thresholds, k: int) -> str:
    e, x = th.enter[k], th.exit[k]
    if e is None:
        return "-"
    rising = th.direction == "rising"
    op = (">" if th.enter_strict[k] else ">=") if rising else ("<" if th.enter_strict[k] else "<=")
    text = f"{op}{e:g}"
    if x == e and th.exit_strict[k] == th.enter_strict[k]:
        return text
    rel = ("<=" if th.exit_strict[k] else "<") if rising else (">=" if th.exit_strict[k] else ">")
    return f"{text} (exit {rel}{x:g})"


def _row(crit: Criterion, th: Thresholds, n: int, extra: str = "") -> list[str]:
    cells = [crit.id + extra, crit.indicator, crit.statistic]
    return cells + [_thr(th, k) for k in range(n)]


def _table(rows: list[list[str]]) -> list[str]:
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in rows]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return lines


def summary(ruleset: Ruleset) -> str:
    """Return tiers, thresholds table, gates, combination, timing, overrides and signals as text."""
    rs, n = ruleset, ruleset.n_tiers - 1
    out = [f"Ruleset {rs.name} version {rs.version} (sha256 {rs.sha256[:12]}, {rs.source})"]
    if rs.description:
        out.append(rs.description.strip())
    if rs.level != "districts":
        out.append(f"Applies to the {rs.level} (indicators from counts summed over districts).")
    out += ["", "Tiers:"]
    out += [f"  {t.level}  {t.name}: {t.staff.strip()}" for t in rs.tiers]
    out += ["", "Criteria (thresholds to enter each tier; release condition in brackets):"]
    header = ["criterion", "indicator", "statistic"] + [f"tier {k}" for k in range(1, n + 1)]
    rows = [header] + [_row(c, c.thresholds, n) for c in rs.criteria]
    for cond in rs.conditions:
        if cond.patch.thresholds is not None:
            crit = rs.criterion(cond.patch.criterion)
            rows.append(
                _row(crit, cond.patch.thresholds, n, f" if {cond.source}>={cond.level_at_least}")
            )
    for ov in rs.overrides:
        for p in ov.patches:
            if p.thresholds is not None:
                rows.append(_row(rs.criterion(p.criterion), p.thresholds, n, f" [{ov.id}]"))
    out += ["  " + line for line in _table(rows)]
    extras = [
        f"  {c.id}: inactive below count {c.min_count:g}"
        for c in rs.criteria
        if c.min_count is not None
    ]
    extras += [f"  {c.id}: nowcast days ignored" for c in rs.criteria if not c.use_nowcast]
    out += extras
    comb = rs.combination
    how = {
        "highest": "highest criterion level",
        "at_least": f"at least {comb.m} criteria",
        "score": "weighted score with cut-offs " + ", ".join(f"{c:g}" for c in comb.cutoffs),
    }[comb.method]
    out += ["", f"Combination: {how}"]
    t = rs.timing
    steps = "any" if t.max_steps_down is None else str(t.max_steps_down)
    out.append(
        f"Timing: up after {t.confirm_days} day(s), down after {t.release_days} day(s), "
        f"at least {t.min_days_in_tier} day(s) in tier, at most {steps} step(s) down, "
        f"effective after {t.effective_delay_days} day(s)"
    )
    hold = rs.testing_hold
    if hold is not None:
        unless = f" unless {' or '.join(hold.unless)} agree" if hold.unless else ""
        out.append(f"Testing hold: {', '.join(hold.criteria)} cannot raise the tier for "
                   f"{hold.days} day(s) after a testing change ({hold.indicator}){unless}")
    for g in rs.gates:
        cond_text = (
            f"{g.indicator} {g.op} {g.value:g}"
            if g.indicator and g.value is not None
            else f"known: {', '.join(g.known)}"
        )
        out.append(f"Gate {g.id}: {cond_text}; otherwise insufficient data")
    for ov in rs.overrides:
        who = ", ".join([*(f"level {lv}" for lv in ov.levels), *ov.regions])
        out.append(f"Override {ov.id}: {who} ({', '.join(p.criterion for p in ov.patches)})")
    for s in rs.prepare:
        out.append(
            f"Prepare {s.id}: {s.indicator} {s.statistic} {s.op} {s.value:g} for {s.for_count} "
            f"{s.count_by}, clears after {s.clear_after_days} quiet days"
        )
    for sc in rs.scenarios:
        path = {"trend": "the current growth rate continues",
                "growth_to": f"growth rate {sc.value:g}/day within {sc.within_days} days",
                "change": f"admissions x{sc.value:g} within {sc.within_days} days"}[sc.kind]
        out.append(f"Scenario {sc.name} ({sc.label}): {path}")
    return "\n".join(out) + "\n"
