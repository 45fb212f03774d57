"""The cautions that go with every output meant for people.

One source for the README, the HTML report and the field sheets, so that the three
never drift apart.  Each caution is a ``(heading, text)`` pair of plain strings; the
renderers below turn the list into markdown, HTML or short lines for a printed page.

The texts are deliberately general: laws, permit systems and institutional rules
differ between countries and change over time, so every caution defers to local
regulations and institutional practice.
"""

from __future__ import annotations

import html

__all__ = [
    "CAUTIONS",
    "cautions",
    "cautions_markdown",
    "cautions_html",
    "cautions_short",
]

#: The cautions as ``(heading, text)`` pairs, in the order they are shown.
CAUTIONS: tuple[tuple[str, str], ...] = (
    (
        "Predictions are hypotheses",
        "Suitability maps, ranges and ranked sites are "
        "hypotheses to guide survey, not evidence that a taxon is present or absent. "
        "They rest on few records and on the chosen environmental layers; a site that "
        "scores well may hold nothing, and a taxon may live where the model predicts "
        "little. A survey that finds nothing is not proof of absence: detection is "
        "imperfect and depends on season, weather and effort.",
    ),
    (
        "Field safety",
        "Remote terrain is dangerous: check weather forecasts and seasonal"
        " hazards, carry reliable communications (a satellite messenger where phone "
        "networks fail) and agree an evacuation plan before leaving. Leave a route "
        "plan and return time with someone who will act on it. Walking times on the "
        "sheets are model estimates from slope alone and ignore vegetation, rivers, "
        "cliffs and fatigue; never plan a trip on them without local knowledge.",
    ),
    (
        "Permits and consent",
        "Obtain the research, collecting and export permits that "
        "local law requires, and the consent of landholders, land managers and local "
        "and Indigenous communities before entering land or taking specimens. Respect "
        "protected areas and access agreements.",
    ),
    (
        "Biosecurity between sites",
        "Clean and disinfect boots, nets and gear between "
        "sites so as not to carry pathogens (for instance amphibian chytrid fungus), "
        "seeds, soil or invasive species from one site or catchment to the next. "
        "Follow the hygiene protocol of your institution or the local authority.",
    ),
    (
        "Sensitive localities",
        "Records of threatened, collectable or persecuted taxa can"
        " attract harm. Share coordinates of sensitive taxa only generalised (for "
        "example to a 0.1 degree grid), keep full-precision files among the survey "
        "team, and check with the data holders before publishing any locality.",
    ),
    (
        "Local rules come first",
        "These notes do not replace local regulations, permit "
        "conditions or the safety, ethics and biosecurity practice of your "
        "institution; where they differ, follow the local rules.",
    ),
)


def cautions() -> list[tuple[str, str]]:
    """Return the cautions as a new list of ``(heading, text)`` pairs.

    Examples
    --------
    >>> cautions()[0][0]
    'Predictions are hypotheses'
    """
    return list(CAUTIONS)


def cautions_markdown(level: int = 2) -> str:
    """Render the cautions as markdown, one heading per caution.

    Parameters
    ----------
    level : int, default 2
        Markdown heading level of the "Cautions" title; each caution is one deeper.

    Returns
    -------
    str
        Markdown text ending in a newline.

    Examples
    --------
    >>> cautions_markdown().splitlines()[0]
    '## Cautions'
    """
    if not 1 <= level <= 5:
        raise ValueError(f"level must be in 1..5; got {level!r}")
    lines = ["#" * level + " Cautions", ""]
    for heading, text in CAUTIONS:
        lines += ["#" * (level + 1) + " " + heading, "", text, ""]
    return "\n".join(lines)


def cautions_html() -> str:
    """Render the cautions as an HTML fragment (a ``<dl>`` list)."""
    parts = ['<dl class="cautions">']
    for heading, text in CAUTIONS:
        parts.append(f"<dt>{html.escape(heading)}</dt><dd>{html.escape(text)}</dd>")
    parts.append("</dl>")
    return "\n".join(parts)


def cautions_short() -> list[str]:
    """One line per caution for a printed page: heading and first sentence.

    Examples
    --------
    >>> cautions_short()[0].startswith("Predictions are hypotheses:")
    True
    """
    out = []
    for heading, text in CAUTIONS:
        first = text.split(". ")[0].rstrip(".") + "."
        out.append(f"{heading}: {first}")
    return out
