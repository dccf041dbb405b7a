"""The fit's decisions in words, for the terminal summary and page 1 of the report.

:func:`decision_lines` turns ``result.diagnostics`` (the sections written to ``fit.json``) into
(topic, sentence) pairs. The sections this module knows (warp and inner change, rings left out of
the geometry, non-circular motions, the radial-flow test, beam smearing, centre, resampling,
asymmetry, the outlier screen) get sentences of their own; any other section (a step added later) is described
generically from its ``detected`` / ``corrected`` / ``adopted`` / ``converged`` / ``fallback`` /
``note`` entries, so a new decision appears without a change here. A ``fallback`` or ``note`` entry
of a known section is appended to its sentence too.

Also :func:`plural` (``plural(1, "galaxy")`` -> ``"1 galaxy"``), used wherever a count is printed.
"""

from __future__ import annotations

import numpy as np

__all__ = ["decision_lines", "plural", "format_radii", "object_name"]

_IRREGULAR = {"galaxy": "galaxies", "is": "are", "was": "were", "pixel": "pixels"}


def plural(n: int, word: str, many: str | None = None) -> str:
    """``"1 ring"``, ``"3 rings"``, ``"2 galaxies"``: the count with the word in the right number."""
    if n == 1:
        return f"{n} {word}"
    return f"{n} {many or _IRREGULAR.get(word, word + 's')}"


def format_radii(radii, unit: str = "arcsec", limit: int = 8) -> str:
    """``"4, 12 and 20 arcsec"``; long lists shortened to their range (``"26 to 90 arcsec"``)."""
    values = [float(r) for r in radii]
    if not values:
        return "none"
    if len(values) > limit:
        return f"{min(values):.0f} to {max(values):.0f} {unit}"
    text = [f"{v:.0f}" for v in values]
    joined = text[0] if len(text) == 1 else ", ".join(text[:-1]) + " and " + text[-1]
    return f"{joined} {unit}"


def object_name(result) -> str:
    """The galaxy's name: the map's OBJECT card, else its file name, else ``"velocity map"``."""
    vmap = result.vmap
    name = getattr(vmap, "object_name", None)
    if name:
        return str(name)
    source = str(getattr(vmap, "source", "") or "")
    return source if source and source != "array" else "velocity map"


def _number(value, fmt: str = ".1f", missing: str = "?") -> str:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return missing
    return format(value, fmt) if np.isfinite(value) else missing


def _extras(section: dict, handled=()) -> str:
    """Sentences for a section's ``fallback`` and ``note`` entries not handled by its own formatter."""
    out = []
    fallback = section.get("fallback")
    if fallback and "fallback" not in handled:
        out.append("fallback used" + (f": {fallback}" if isinstance(fallback, str) else ""))
    note = section.get("note")
    if note and "note" not in handled:
        out.append(str(note))
    return ("; " + "; ".join(out)) if out else ""


def _warp(section: dict, result) -> list:
    lines = []
    if section.get("detected"):
        text = (f"warp beyond {_number(section.get('onset_radius'))} arcsec: the position angle turns by "
                f"{_number(section.get('twist'), '+.1f')} deg and the inclination changes by "
                f"{_number(section.get('tilt'), '+.1f')} deg out to the last ring ({section.get('profile', 'warped')})")
        if section.get("delta_bic") is not None:
            text += f"; preferred over a flat disc by delta BIC {_number(section['delta_bic'], '.0f')}"
    elif section.get("note"):
        text = str(section["note"])
    else:
        text = "flat disc: one position angle and one inclination describe every ring"
        if section.get("delta_bic") is not None:
            needed = (section.get("thresholds") or {}).get("min_delta_bic")
            text += (f" (warp test: delta BIC {_number(section['delta_bic'], '.0f')}"
                     + (f", a warp needs more than {_number(needed, 'g')})" if needed is not None else ")"))
    lines.append(("geometry", text + _extras(section, ("note",))))
    inner = section.get("inner_change")
    if inner:
        lines.append(("inner change", f"the rings inside {_number(inner.get('radius'))} arcsec depart from the outer "
                                      f"disc (position angle {_number(inner.get('position_angle_change'), '+.1f')} deg, "
                                      f"inclination {_number(inner.get('inclination_change'), '+.1f')} deg): non-circular "
                                      "motions or an inner disc; the outer geometry is used for every ring"))
    excluded = section.get("rings_excluded_as_non_circular")
    if excluded:
        lines.append(("rings left out", f"{plural(len(excluded), 'ring')} ({format_radii(excluded)}) took no part in "
                                        "the geometry: not circular even at their own best geometry"))
    elif excluded is not None:
        lines.append(("rings left out", "none: every usable ring took part in the geometry"))
    return lines


def _non_circular(section: dict, result) -> list:
    if not section.get("detected"):
        text = "none detected"
        if section.get("disc_preferred_model"):
            text += f"; the disc as a whole prefers the {section['disc_preferred_model']} model"
        return [("non-circular motions", text + _extras(section))] + _flow_guards(section)
    kinds = ", ".join(section.get("kinds") or [section.get("kind") or "harmonic"])
    radii = section.get("radii") or []
    text = (f"{kinds} in {plural(len(radii), 'ring')} ({format_radii(radii)}), up to "
            f"{_number(section.get('max_amplitude'), '.0f')} km/s in the disc plane: v_rotation there is not the "
            "circular speed")
    if section.get("bar_angle") is not None:
        text += f"; bar angle {_number(section['bar_angle'], '.0f')} deg in the disc plane"
    return [("non-circular motions", text + _extras(section))] + _flow_guards(section)


def _flow_guards(section: dict) -> list:
    """Lines for the flow test's guards (:mod:`..diagnostics.flows`): rings radial and bisymmetric flows explain
    about equally, and rings with data on one half only."""
    lines = []
    if section.get("radial_or_bisymmetric_note"):
        lines.append(("radial or bar", str(section["radial_or_bisymmetric_note"])))
    one_sided = section.get("one_sided_radii") or []
    if one_sided:
        lines.append(("one-sided rings", f"{plural(len(one_sided), 'ring')} ({format_radii(one_sided)}) with data on "
                                         "one half only (of either side of the major or minor axis): not tested "
                                         "for non-circular motions"))
    return lines


def _radial_test(section: dict, result) -> list:
    verdict = "adopted" if section.get("adopted") else "not adopted"
    return [("radial-flow refit", f"a refit with v_radial free in every ring (as --fit-radial does) was {verdict} "
                                  f"(disc-wide delta BIC "
                                  f"{_number(section.get('delta_bic'), '.0f')})" + _extras(section))]


def _beam(section: dict, result) -> list:
    fallback = section.get("fallback")
    if fallback or section.get("corrected") is False:
        text = "not applied" + (f": {fallback}" if isinstance(fallback, str) else "")
        text += "; v_rotation within about two beams of the centre is biased low"
    else:
        intensity = section.get("intensity")
        text = "corrected by forward modelling" + (f" ({intensity})" if intensity else "")
        if section.get("iterations") is not None:
            settled = "settled" if section.get("converged", True) else "did NOT settle"
            text += f"; {settled} after {plural(int(section['iterations']), 'iteration')}"
        changed = section.get("geometry_change") or {}
        moved = {k: v for k, v in changed.items() if v is not None and abs(float(v)) >= 0.05}
        if moved:
            text += "; geometry moved: " + ", ".join(f"{k.replace('_', ' ')} {_number(v, '+.1f')} deg"
                                                     for k, v in moved.items())
        beyond = section.get("geometry_change_beyond_error") or []
        if beyond:
            text += "; smearing biases the " + " and ".join(n.replace("_", " ") for n in beyond) + " beyond its error"
    return [("beam smearing", text + _extras(section, ("fallback",)))]


def _centre(section: dict, result) -> list:
    if section.get("fallback"):
        why = section.get("disagrees_with_rings")
        text = ("the rings' weighted medians (the all-pixel fit " +
                (f"disagreed in {', '.join(why)})" if why else "did not settle)"))
    else:
        text = "one fit to all pixels inside the outermost ring"
    return [("centre and v_systemic", text + _extras(section, ("fallback",)))]


def _resampling(section: dict, result) -> list:
    n = int(section.get("realisations") or 0)
    return [("errors", f"random part: the scatter of v_rotation over {plural(n, 'resampled noise field')} (seed "
                       f"{section.get('seed')}, orientation held); the constant orientation's error: the larger of "
                       "the geometry profile's and the fields' scatter" + _extras(section))]


def _orientation_spread(section: dict, result) -> list:
    spread = {k: v for k, v in (section.get("degrees") or {}).items() if v is not None and np.isfinite(v)}
    if not spread:
        return []
    if not any(v > 0.05 for v in spread.values()):
        return [("orientation spread", "the rings agree with the adopted orientation within their noise")]
    return [("orientation spread", "rings scatter about the adopted orientation beyond their noise by " +
             ", ".join(f"{k.replace('_', ' ')} {_number(v, '.1f')} deg" for k, v in spread.items()) +
             " (added to each ring's orientation error)")]


def _error_model(section: dict, result) -> list:
    return [("error parts", "v_rotation_err = random, geometry (correlated across rings), beam and asymmetry parts "
                            "in quadrature; covariance between rings in curve_covariance.ecsv")]


def _asymmetry(section: dict, result) -> list:
    if section.get("lopsidedness") is None:
        return []
    return [("sides", f"receding minus approaching speed: median {_number(section.get('median_difference'), '+.1f')} "
                      f"km/s, largest {_number(section.get('max_difference'), '+.1f')} km/s (lopsidedness "
                      f"{100 * float(section['lopsidedness']):.1f} per cent)" + _extras(section))]


def _outliers(section: dict, result) -> list:
    if not section.get("screened"):
        return [("outliers", str(section.get("note", "not screened")))]
    n, judged = int(section.get("n_left_out", 0)), int(section.get("n_judged", 0))
    level = _number(section.get("level_robust_sigma"), "g")
    if section.get("applied"):
        text = (f"{plural(n, 'pixel')} ({100 * float(section.get('share_left_out', 0)):.2f} % of {judged}) beyond "
                f"{level} robust sigma off a median ring model left out" + (" (mapped in left_out.fits)" if n else ""))
    elif section.get("kept_because") == "small_cost":
        text = (f"none left out: {plural(int(section.get('n_beyond_level', 0)), 'pixel')} beyond {level} robust "
                f"sigma hold only {100 * float(section.get('cost_share', 0)):.0f} % of the residual cost (under a "
                "quarter): they do not steer the fit, and are kept")
    else:
        text = (f"none left out: {plural(int(section.get('n_beyond_level', 0)), 'pixel')} "
                f"({100 * float(section.get('share_beyond_level', 0)):.1f} %) lie beyond {level} robust sigma, more "
                f"than the {100 * float(section.get('share_limit', 0)):g} % the screen may leave out")
    return [("outliers", text)]


def _generic(key: str, section) -> list:
    """A section this module does not know: its yes/no entries, fallback and note."""
    topic = key.replace("_", " ")
    if not isinstance(section, dict):
        if isinstance(section, (str, int, float, bool)):
            return [(topic, str(section))]
        return []
    parts = []
    for name in ("detected", "corrected", "adopted", "converged", "applied"):
        if name in section and isinstance(section[name], (bool, np.bool_)):
            parts.append(f"{name}: {'yes' if section[name] else 'no'}")
    for name in ("convention", "source", "method"):
        if isinstance(section.get(name), str) and len(section[name]) < 90:
            parts.append(f"{name}: {section[name]}")
    text = "; ".join(parts) if parts else "see fit.json"
    extra = _extras(section)
    return [(topic, text + extra if parts else (extra[2:] if extra else text))]


_KNOWN = {"warp": _warp, "non_circular": _non_circular, "radial_test": _radial_test, "beam_smearing": _beam,
          "centre": _centre, "resampling": _resampling, "asymmetry": _asymmetry,
          "orientation_spread": _orientation_spread, "error_model": _error_model, "outliers": _outliers}
_ORDER = ("outliers", "centre", "warp", "beam_smearing", "non_circular", "radial_test", "asymmetry", "resampling",
          "orientation_spread", "error_model")


def decision_lines(result) -> list:
    """(topic, sentence) pairs for every section of ``result.diagnostics`` (module docstring), known
    sections first in a fixed order, then the others in their own order. Beam smearing is named even
    when it did not run (no beam, or switched off)."""
    diagnostics = dict(getattr(result, "diagnostics", {}) or {})
    lines = []
    keys = [k for k in _ORDER if k in diagnostics] + [k for k in diagnostics if k not in _ORDER]
    for key in keys:
        formatter = _KNOWN.get(key)
        lines += formatter(diagnostics[key], result) if formatter else _generic(key, diagnostics[key])
        if key == "warp" and "beam_smearing" not in diagnostics:
            lines.append(("beam smearing", _no_beam_reason(result)))
    if "warp" not in diagnostics and "beam_smearing" not in diagnostics:
        lines.append(("beam smearing", _no_beam_reason(result)))
    return lines


def _no_beam_reason(result) -> str:
    if getattr(result.vmap, "beam", None) is None:
        return "not corrected: no beam known (give --beam); pixels treated as independent"
    options = getattr(result, "options", None)
    if options is not None and not getattr(options, "beam_correction", True):
        return "not corrected: switched off (--no-beam-correction); the inner curve is biased low"
    return "not corrected; v_rotation within about two beams of the centre is biased low"
