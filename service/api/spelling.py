"""The accepted name a client most likely meant by a name the service does not know.

Field names here carry their unit ("ra_deg", "parallax_mas", "pressure_hpa"), so the usual
slip is the bare quantity ("ra", "parallax") or a typing error ("target_epoch",
"paralax_mas"), and catalogue files often come with the short column names common in
astrometric catalogues ("pmra", "pmdec", "ra_dec_corr"). Problems that refuse an unknown name
add the likely one; the name is never taken in its place (its unit would be a guess).
"""

from __future__ import annotations

import difflib

#: Least similarity (difflib's ratio, 0 to 1) for a typing error to be suggested.
SIMILARITY_CUTOFF = 0.75

#: Short words of catalogue column names (common practice), as the words of ours.
WORD_ALIASES = {
    "pmra": "pm_ra",
    "pmdec": "pm_dec",
    "plx": "parallax",
    "rv": "radial_velocity",
    "vrad": "radial_velocity",
    "elevation": "height",
}

#: Words of field names that give a unit (or, for cosdec, how a quantity is measured).
UNIT_WORDS = frozenset(
    {"deg", "mas", "arcsec", "yr", "km", "s", "m", "hpa", "c", "um", "pc", "px", "cosdec"}
)

#: Whole names that stand for another name of the same role (the first of those the request
#: takes is offered): a span's ends (or the range that holds them), the instants or target
#: epochs, the site, the air, the table of stars (positions too: every table is "stars").
_WHEN = ("instants", "target_epochs")
_RANGE = ("target_range", "instant_range")
NAME_ALIASES = {
    "stop": ("end", *_RANGE),
    "end": ("stop", *_RANGE),
    "start": _RANGE,
    "count": _RANGE,
    "range": _RANGE,
    "epoch_range": _RANGE,
    "time_range": ("instant_range",),
    "start_epoch": ("start", *_RANGE),
    "end_epoch": ("end", *_RANGE),
    "stop_epoch": ("end", *_RANGE),
    "start_time": ("start", "instant_range"),
    "end_time": ("end", "instant_range"),
    "stop_time": ("end", "instant_range"),
    "epochs": ("target_epochs", "instants"),
    "epoch": ("instants",),  # beside catalogue_epoch; where target_epochs is taken, both
    "instant": ("instants",),  # not instant_range, which holds the word too
    "times": _WHEN,
    "time": _WHEN,
    "dates": _WHEN,
    "date": _WHEN,
    "reference_epoch": ("catalogue_epoch",),
    "ref_epoch": ("catalogue_epoch",),
    "location": ("site",),
    "observatory": ("site",),
    "observer": ("site",),
    "weather": ("atmosphere",),
    "conditions": ("atmosphere",),
    "positions": ("stars",),
    "coordinates": ("stars",),
    "targets": ("stars",),
    "objects": ("stars",),
    "sources": ("stars",),
    "catalogue": ("stars",),
    "catalog": ("stars",),
    "rates": ("include_rates",),
    "image_format": ("format",),
}


def _our_words(key: str) -> list[str]:
    """The words of ``key`` with catalogue short forms written as ours: "pmra_error" ->
    pm, ra, error; "ra_dec_corr" and "ra_dec_correlation" -> correlation, ra, dec."""
    words = [w for w in key.split("_") if w]
    if len(words) >= 3 and words[-1] in ("corr", "correlation"):
        words = ["correlation", *words[:-1]]
    return "_".join(WORD_ALIASES.get(w, w) for w in words).split("_")


def _added_words(given: list[str], name: list[str]) -> list[str] | None:
    """The words of ``name`` left over when each word of ``given`` begins one of them, in
    order ("pm_ra" in "pm_ra_cosdec_mas_yr": cosdec, mas, yr; "ra_err" in "ra_error_mas":
    mas), or None where ``given`` does not fit."""
    added, k = [], 0
    for word in name:
        if k < len(given) and word.startswith(given[k]):
            k += 1
        else:
            added.append(word)
    return added if k == len(given) else None


def closest_name(given: str, accepted) -> str | None:
    """The accepted name ``given`` most likely stands for, or None.

    Matching ignores case. A whole-name alias ("stop" for "end") first; then, with
    catalogue short forms written as ours ("pmra" -> "pm_ra"), the shortest accepted name
    that holds the words of ``given`` (split at "_") as the starts of its own words, in
    order, and adds only units: "ra" -> "ra_deg", "pm_ra_mas_yr" -> "pm_ra_cosdec_mas_yr",
    "ra_err" -> "ra_error_mas" (nothing for "pm" or "mas"); or else the only accepted name
    whose first words are those of ``given``, whole ("from" -> "from_frame"). Otherwise the
    most similar name by difflib, if similar enough (a typing error: "paralax_mas").
    """
    if not isinstance(given, str) or not given:
        return None
    names = {str(a).lower(): str(a) for a in accepted}
    key = given.lower()
    if key in names:
        return names[key] if names[key] != given else None
    for alias in NAME_ALIASES.get(key, ()):
        if alias in names:
            return names[alias]
    words = _our_words(key)
    if "_".join(words) in names:
        return names["_".join(words)]
    # A name that is the given words with only units added: "ra" -> "ra_deg" (not
    # "ra_error_mas", nor, for "pm", any one proper-motion component).
    fits = []
    for name in names:
        added = _added_words(words, name.split("_"))
        if added is not None and UNIT_WORDS.issuperset(added):
            fits.append((len(name), name))
    fits.sort()
    if fits:
        return names[fits[0][1]]
    # The only name that begins with the given words, whole: "from" -> "from_frame",
    # "monte_carlo" -> "monte_carlo_draws" (nothing for "target": target_epochs or
    # target_range).
    starts = [name for name in names if name.split("_")[: len(words)] == words]
    if len(starts) == 1:
        return names[starts[0]]
    close = difflib.get_close_matches(key, list(names), n=1, cutoff=SIMILARITY_CUTOFF)
    return names[close[0]] if close else None


def names_holding(given: str, accepted) -> list[str]:
    """The accepted names that hold the words of ``given`` whole and in a row (the last
    one may take a plural "s"), in their order: "epoch" -> catalogue_epoch, target_epochs;
    "frame" -> from_frame, to_frame. Nothing for units alone ("deg")."""
    if not isinstance(given, str) or not given:
        return []
    words = _our_words(given.lower())
    if UNIT_WORDS.issuperset(words):
        return []
    n = len(words)
    out = []
    for name in accepted:
        parts = str(name).lower().split("_")
        for i in range(len(parts) - n + 1):
            run = parts[i : i + n]
            if run[:-1] == words[:-1] and run[-1] in (words[-1], words[-1] + "s"):
                out.append(str(name))
                break
    return out


def likely_names(given: str, accepted) -> list[str]:
    """The accepted names ``given`` likely stands for: one (:func:`closest_name`), or two or
    three where it names what they share ("epoch" on a propagation: catalogue_epoch or
    target_epochs), or none. A whole-name alias the request takes comes first ("epochs" ->
    target_epochs)."""
    if not isinstance(given, str):
        return []
    lowered = {str(a).lower() for a in accepted}
    aliased = lowered.intersection(NAME_ALIASES.get(given.lower(), ()))
    holding = names_holding(given, accepted)
    if not aliased and 2 <= len(holding) <= 3:
        return holding
    likely = closest_name(given, accepted)
    if len(holding) == 1 and holding[0] != likely and (likely is None or aliased):
        # the one name holding it ("limit": horizon_limit_deg), beside an alias the request
        # takes ("epoch" on an observed place: catalogue_epoch or instants)
        return holding if likely is None else [holding[0], likely]
    return [] if likely is None else [likely]


def accepted_names(schema) -> list[str]:
    """The names a request may give for the fields of a marshmallow ``schema``."""
    return [f.data_key or name for name, f in schema.fields.items() if not f.dump_only]


def meant_by_unknown_names(sent, schema) -> set[str]:
    """The fields of ``schema`` that an unknown name of ``sent`` (a request body) stands
    for, where it stands for one only (as the problem's hint names it): a check of several
    fields that would call such a field missing keeps quiet, as "is required" does
    (errors.with_likely_names), since the name's own message says which it is."""
    if not isinstance(sent, dict):
        return set()
    accepted = accepted_names(schema)
    meant = set()
    for key in set(sent).difference(accepted):
        likely = likely_names(key, accepted)
        if len(likely) == 1:
            meant.add(likely[0])
    return meant


def did_you_mean(likely: list[str]) -> str:
    """' (did you mean "a"?)' or ' (did you mean "a" or "b"?)'; '' for none."""
    named = " or ".join(f'"{name}"' for name in likely)
    return f" (did you mean {named}?)" if likely else ""


def unknown_name_text(given: str, accepted, listing: str | None = None) -> str:
    """'unknown field (did you mean "x"?)' (when one or a few are likely,
    :func:`likely_names`), then '; ' and ``listing``."""
    text = "unknown field" + did_you_mean(likely_names(given, accepted))
    return f"{text}; {listing}" if listing else text
