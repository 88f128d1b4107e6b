"""Caption and alt-text wording shared by the figures: numbers, verdicts, flagged points."""

from __future__ import annotations

import math
import re

from premises.figures.base import Cloud, FlagSet
from premises.results import Finding

__all__ = [
    "cloud_words",
    "density_note",
    "flag_sentence",
    "format_number",
    "join_caption",
    "points_word",
    "slugify",
    "verdict_sentence",
]


def format_number(value: float | None, digits: int = 3) -> str:
    """About ``digits`` significant digits, no scientific notation for everyday sizes."""
    if value is None or not math.isfinite(value):
        return "undefined"
    if value == 0:
        return "0"
    if float(value).is_integer() and abs(value) < 1e6:
        return f"{int(value):,}"
    magnitude = math.floor(math.log10(abs(value)))
    if magnitude >= 6 or magnitude < -4:
        mantissa = value / 10.0**magnitude
        return f"{mantissa:.{digits - 1}f} × 10{_superscript(magnitude)}"
    decimals = max(0, digits - 1 - magnitude)
    return f"{value:,.{decimals}f}"


def _superscript(k: int) -> str:
    """An integer exponent in Unicode superscript digits."""
    return str(k).translate(str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹"))


def verdict_sentence(finding: Finding) -> str:
    """The caption's closing sentence: the verdict and the measure it rests on."""
    if finding.verdict == "not-assessed":
        why = finding.reason or "the check could not be run"
        return f"Not assessed: {why.rstrip('.')}."
    text = f"Verdict: {finding.verdict}"
    measure = finding.measure
    if measure is not None and measure.value is not None:
        text += f"; {measure.name} = {format_number(measure.value)}"
    return text + "."


def flag_sentence(flags: FlagSet) -> str:
    """Alt-text clause naming the labelled flagged points (and how many are not drawn)."""
    names = ", ".join(flags.labelled)
    if flags.total == 0 or not names:
        return "no flagged points"
    if flags.total > flags.index.size:
        return (
            f"{flags.total:,} flagged points, of which the {flags.index.size} most influential "
            f"are drawn and {len(flags.labelled)} labelled: {names}"
        )
    more = flags.total - len(flags.labelled)
    tail = f" and {more} more unlabelled" if more > 0 else ""
    return f"{points_word(flags.total, 'flagged point')} labelled {names}{tail}"


def density_note(cloud: Cloud) -> str:
    """Caption sentence for density mode (empty for a plain scatter)."""
    if not cloud.dense:
        return ""
    return (
        f"With {cloud.n:,} points the cloud is a 2-D histogram (darker cells hold more points, "
        "log scale); flagged points are drawn one by one on top."
    )


def join_caption(*sentences: str) -> str:
    """Sentences joined by single spaces, empty ones dropped."""
    return " ".join(s.strip() for s in sentences if s and s.strip())


def slugify(text: str) -> str:
    """Lower-case ``[a-z0-9-]`` form of a term name, for figure ids and file names."""
    slug = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return slug or "term"


def cloud_words(cloud: Cloud, noun: str, against: str) -> str:
    """Alt-text opening: 'Scatter of 180 residuals against fitted values' (or density wording)."""
    if cloud.dense:
        return (
            f"Shaded 2-D histogram (log count scale) of {points_word(cloud.n, noun)} "
            f"against {against}"
        )
    return f"Scatter of {points_word(cloud.n, noun)} against {against}"


def points_word(n: int, noun: str = "point") -> str:
    """``1 point`` / ``180 points`` with thousands separators."""
    return f"{n:,} {noun}" + ("" if n == 1 else "s")
