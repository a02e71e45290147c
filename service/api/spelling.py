"""The accepted name a client most likely meant by a name the service does not know.

Field names here carry their unit ("ra_deg", "parallax_mas", "pressure_hpa"), so the usual
slip is the bare quantity ("ra", "parallax") or a typing error ("target_epoch",
"paralax_mas"). Problems that refuse an unknown name add the likely one.
"""

from __future__ import annotations

import difflib

#: Least similarity (difflib's ratio, 0 to 1) for a typing error to be suggested.
SIMILARITY_CUTOFF = 0.75


def _covers(given: list[str], name: list[str]) -> bool:
    """Each word of ``given`` begins a word of ``name``, in order ("pm_ra" in
    "pm_ra_cosdec_mas_yr", "ra_err" in "ra_error_mas")."""
    words = iter(name)
    return all(any(w.startswith(g) for w in words) for g in given)


def closest_name(given: str, accepted) -> str | None:
    """The accepted name ``given`` most likely stands for, or None.

    Matching ignores case. First, accepted names that contain the words of ``given`` (split
    at "_") as the starts of their own words, in order: "ra" -> "ra_deg", "pm_ra_mas_yr" ->
    "pm_ra_cosdec_mas_yr" (a single word only at the start: "mas" gets none); of several,
    one that starts as ``given`` does and adds the fewest words, if only one does. Otherwise
    the most similar name by difflib, if similar enough (a typing error: "paralax_mas").
    """
    if not isinstance(given, str) or not given:
        return None
    names = {str(a).lower(): str(a) for a in accepted}
    key = given.lower()
    if key in names:
        return names[key] if names[key] != given else None
    words = [w for w in key.split("_") if w]
    ranked = sorted(
        (not name.split("_")[0].startswith(words[0]), len(name.split("_")) - len(words), name)
        for name in names
        if words
        and _covers(words, name.split("_"))
        and (len(words) > 1 or name.startswith(words[0]))  # "mas" is no field's start
    )
    if ranked:
        best = ranked[0]
        if len(ranked) == 1 or ranked[1][:2] != best[:2]:
            return names[best[2]]
        return None
    close = difflib.get_close_matches(key, list(names), n=1, cutoff=SIMILARITY_CUTOFF)
    return names[close[0]] if close else None


def unknown_name_text(given: str, accepted, listing: str | None = None) -> str:
    """'unknown field (did you mean "x"?)' (when one is likely), then '; ' and ``listing``."""
    likely = closest_name(given, accepted)
    text = "unknown field" if likely is None else f'unknown field (did you mean "{likely}"?)'
    return f"{text}; {listing}" if listing else text
