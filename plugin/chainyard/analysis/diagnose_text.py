"""The diagnostics result as plain text: the table with its verdict, for terminals and logs."""

from __future__ import annotations

from typing import Any

from chainyard.display import accept_reject_line

__all__ = ["format_table", "reference_lines"]


def _num(value: Any, fmt: str) -> str:
    """``value`` formatted, or a dash right-aligned to the same width when it is missing."""
    if value is None:
        width = "".join(ch for ch in fmt.split(".")[0].split(",")[0] if ch.isdigit())
        return "-".rjust(int(width) if width else 1)
    return format(value, fmt)


def _questions(check: dict[str, Any]) -> str:
    """``ok`` or the failed questions of one parameter, e.g. ``FAIL tau,precision``."""
    failed = [q for q, ok in check.get("checks", {}).items() if not ok]
    if check["ok"]:
        return "ok"
    return "FAIL " + ",".join(failed) if failed else "FAIL"


def format_table(result: dict[str, Any], title: str = "", selection: str | None = None) -> str:
    """A plain-text table of the diagnostics with the verdict (for terminals and logs).

    ``selection`` says which draws were diagnosed (default "after burn-in", as the
    workflow's selection always is).

    Columns: nested R-hat (mixing), classic R-hat (reported), tau growth and steps per tau
    (tau), bulk/tail ESS (precision); under the table the verdict, the steps still needed,
    and one line per check saying what it compares.
    """
    head = (
        f"{'parameter':<16}{'mean':>11}{'sd':>10}{'MCSE':>9}{'nR-hat':>8}{'R-hat':>7}"
        f"{'ESS bulk':>9}{'ESS tail':>9}{'tau':>8}{'steps/tau':>10}{'growth':>7}"
        f"{'steps needed':>13}  check"
    )
    lines = []
    if title:
        lines.append(title)
    unit = "walkers" if result.get("sampler_kind", "ensemble") == "ensemble" else "chains"
    lines.append(
        f"{result['replicas']} replica(s) x {result['walkers']} {unit} x "
        f"{result['steps']:,} steps ({selection or 'after burn-in'})"
    )
    lines.append(head)
    lines.append("-" * len(head))
    checks = result["verdict"]["params"]
    for name, d in result["params"].items():
        c = checks[name]
        lines.append(
            f"{name[:15]:<16}{_num(d['mean'], '11.5g')}{_num(d['sd'], '10.4g')}"
            f"{_num(d['mcse_mean'], '9.3g')}{_num(d.get('rhat_nested'), '8.4f')}"
            f"{_num(d['rhat'], '8.4f')}"
            f"{_num(d['ess_bulk'], '9.0f')}{_num(d['ess_tail'], '9.0f')}"
            f"{_num(d['tau'], '8.1f')}{_num(d['steps_per_tau'], '10.1f')}"
            f"{_num(d.get('tau_growth'), '7.3f')}{_num(c.get('steps_needed'), '13,d')}  "
            + _questions(c)
        )
    lines.append("")
    lines.extend(result["verdict"]["lines"])
    lines.extend(f"warning: {m}" for m in result["acceptance_warnings"])
    if result.get("basis"):
        lines.append(f"Basis: {result['basis']}")
    ar = result.get("accept_reject")
    if ar:
        lines.append(accept_reject_line(ar))
    if result.get("reference"):
        lines.extend(reference_lines(result["reference"]))
    lines.append("What each check compares:")
    lines.extend(
        f"  {key}: {text}" for key, text in result.get("what_each_check_compares", {}).items()
    )
    lines.append("Diagnostics can show non-convergence; they cannot prove convergence.")
    return "\n".join(lines)


def reference_lines(ref: dict[str, Any]) -> list[str]:
    """The two-sample comparison with a reference run, one line per parameter."""
    lines = [f"Compared with reference {ref['reference']} ({ref['method']}):"]
    for name, r in ref["params"].items():
        lines.append(
            f"  {name}: KS D = {r['ks_statistic']:.4f}, p = {r['ks_pvalue']:.3g} (effective "
            f"sizes {r['n_effective']:.0f} vs {r['m_effective']:.0f}), energy distance "
            f"{r['energy_distance']:.4g}; {'differs' if r['differs'] else 'consistent'}"
        )
    return lines
