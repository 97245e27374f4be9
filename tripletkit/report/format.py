"""How every report spells a number: rates, counts, intervals, differences and Markdown tables.

The score report, the sweep report, their plots, the sweep's verdict and its progress lines
format numbers only through these functions, so that one value reads the same everywhere: a rate
is a percentage with two decimals and no space (``2.00%``), a count has thousands separators
(``1,290``), a rate's interval is ``lo – hi`` in the rate's spelling, and a signed difference has
four significant digits with its interval in brackets (``[-0.002862, 0.002936]``: a dash between
signed bounds would read as a minus). A missing or non-finite value reads ``n/a``.
"""

from __future__ import annotations

import math

__all__ = ["number", "percent", "interval", "with_interval", "level", "compact", "significant", "bracketed",
           "duration", "fmr_target", "metric_label", "table", "verification_part", "sorted_targets"]


def _missing(x):
    return x is None or (isinstance(x, float) and not math.isfinite(x))


def number(x, digits=4):
    """A value: ``n/a``, ``yes``/``no`` for a flag, a count with separators, or ``digits`` decimals."""
    if _missing(x):
        return "n/a"
    if isinstance(x, bool):
        return "yes" if x else "no"
    if isinstance(x, int):
        return f"{x:,}"
    return f"{x:.{digits}f}"


def percent(x, digits=2):
    """A rate (a fraction) as a percentage: ``0.0359`` -> ``3.59%``."""
    if _missing(x):
        return "n/a"
    return f"{100.0 * x:.{digits}f}%"


def interval(ci, spell=percent):
    """An interval ``[lo, hi]`` as ``lo – hi``, each bound spelt by ``spell``; ``n/a`` when absent."""
    if not ci:
        return "n/a"
    return f"{spell(ci[0])} – {spell(ci[1])}"


def with_interval(x, ci, spell=percent):
    """A value followed by its interval in parentheses (the value alone when there is none)."""
    return spell(x) + (f" ({interval(ci, spell)})" if ci else "")


def level(confidence):
    """A confidence level: ``0.95`` -> ``95%``."""
    return f"{confidence:.0%}"


def compact(x):
    """A setting as the user wrote it (a margin, an FMR target): ``0.05``, ``0.0001``, ``1e-05``."""
    return f"{float(x):g}"


def significant(x, digits=4):
    """A signed difference with ``digits`` significant digits: ``0.0002381``."""
    return "n/a" if _missing(x) else f"{x:.{digits}g}"


def bracketed(ci, digits=4):
    """The interval of a signed difference: ``[-0.002862, 0.002936]``."""
    return f"[{significant(ci[0], digits)}, {significant(ci[1], digits)}]"


def duration(seconds):
    """Wall time: ``0.4 s``."""
    return f"{number(seconds, 1)} s"


def fmr_target(key):
    """An FMR target key as a share and, when it is one, as 1 in N: ``'0.001'`` -> ``0.1% (1 in 1,000)``."""
    x = float(key)
    share = f"{100.0 * x:.6g}%"
    if x > 0 and abs(1.0 / x - round(1.0 / x)) < 1e-6 * (1.0 / x) and round(1.0 / x) > 1:
        return f"{share} (1 in {round(1.0 / x):,})"
    return share


def metric_label(primary):
    """The name of a ranking metric (``"eer"`` or ``"fnmr@<fmr>"``): ``EER``, ``FNMR at FMR = 0.001``."""
    return "EER" if primary == "eer" else f"FNMR at FMR = {primary.split('@', 1)[1]}"


def table(header, rows):
    """Lines of a Markdown table: the header, its rule and one line per row (cells as given)."""
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(str(cell) for cell in row) + " |" for row in rows]
    return lines


# -- reading report dicts (shared by the Markdown and the plots) -------------------------------
def verification_part(report):
    """The verification part of a full report, or ``report`` itself when it is one already."""
    if report is None:
        return {}
    if "verification" in report:
        return report.get("verification") or {}
    return report


def sorted_targets(keys):
    """FMR target keys (strings such as ``'0.001'``) in ascending order of the target."""
    return sorted(keys, key=float)
