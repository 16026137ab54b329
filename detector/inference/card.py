"""The model card's schema: every field the runtime reads, its type, length and range.

:func:`check_card` runs when a model is loaded, before any number of the card is
used, so a hand-edited or damaged ``model.json`` is refused with one message
naming the field and its value (``assembly.min_score nan`` would otherwise
silently drop every detection, ``-5`` keep every candidate).
"""

import math
import re

from ..errors import ModelError

__all__ = ["check_card"]

_HEX64 = re.compile(r"^[0-9a-f]{64}$")


class _Checker:
    def __init__(self, card, source):
        self.card = card
        self.source = source

    def fail(self, where, value, expected):
        shown = repr(value)
        if len(shown) > 60:
            shown = shown[:57] + "..."
        raise ModelError(f"{self.source}: field {where!r} is {shown}; expected {expected}.")

    def get(self, where, *, required=True):
        node = self.card
        for key in where.split("."):
            if not isinstance(node, dict) or key not in node:
                if required:
                    raise ModelError(f"{self.source} lacks the field {where!r}.")
                return None
            node = node[key]
        return node

    def number(self, where, value, *, lo=-math.inf, hi=math.inf, lo_open=False, integer=False):
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if ok and integer:
            ok = float(value).is_integer()
        if ok:
            ok = math.isfinite(value) and (value > lo if lo_open else value >= lo) and value <= hi
        if not ok:
            kind = "a whole number" if integer else "a finite number"
            bounds = f" {'>' if lo_open else '>='} {lo}" if lo > -math.inf else ""
            bounds += f"{',' if bounds else ''} <= {hi}" if hi < math.inf else ""
            self.fail(where, value, kind + bounds)
        return value

    def numbers(self, where, value, *, length=None, **bounds):
        if not isinstance(value, list) or (length is not None and len(value) != length):
            self.fail(where, value, f"a list of {length if length is not None else 'some'} numbers")
        for i, v in enumerate(value):
            self.number(f"{where}[{i}]", v, **bounds)
        return value

    def names(self, where, value, *, allowed=None, length=None):
        if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
            self.fail(where, value, "a list of names (strings)")
        if length is not None and len(value) != length:
            self.fail(where, value, f"{length} names")
        if allowed is not None:
            unknown = [v for v in value if v not in allowed]
            if unknown:
                self.fail(where, unknown[0], "a name this code knows")
        return value


def _refinement_features(c, where, entry, object_feature_names):
    """``entry`` (the card's ``where``) is an object whose ``features`` are the code's refinement
    features in order; returns them."""
    from ..objects.refine import REFINE_FEATURE_NAMES

    if not isinstance(entry, dict):
        c.fail(where, entry, "an object or null")
    used = c.names(f"{where}.features", c.get(f"{where}.features"))
    expected = list(object_feature_names) + list(REFINE_FEATURE_NAMES[len(object_feature_names):])
    if used != expected:
        c.fail(f"{where}.features", used, f"the {len(expected)} refinement features of this code, in order")
    return used


def _check_refine_model(c, refine, object_feature_names):
    """The card's ``refine_model`` (:mod:`detector.objects.refine`): one ridge fit per kind over the
    code's refinement features, in the code's order, with one row of coefficients per output."""
    from ..objects.refine import REFINE_OUTPUTS

    n = len(_refinement_features(c, "refine_model", refine, object_feature_names))
    for kind, outputs in REFINE_OUTPUTS.items():
        where = f"refine_model.{kind}"
        c.numbers(f"{where}.mean", c.get(f"{where}.mean"), length=n)
        c.numbers(f"{where}.scale", c.get(f"{where}.scale"), length=n, lo=0.0, lo_open=True)
        coef = c.get(f"{where}.coef")
        if not isinstance(coef, list) or len(coef) != len(outputs):
            c.fail(f"{where}.coef", coef, f"{len(outputs)} rows of coefficients ({', '.join(outputs)})")
        for i, row in enumerate(coef):
            c.numbers(f"{where}.coef[{i}]", row, length=n)
        c.numbers(f"{where}.intercept", c.get(f"{where}.intercept"), length=len(outputs))


def _check_refine_turn(c, turn, object_feature_names, files):
    """The card's ``refine_turn`` (:mod:`detector.objects.refine`): a boosted turn of fan directions
    over the code's refinement features, in ``turn.onnx`` (whose sha256 ``files`` must record)."""
    _refinement_features(c, "refine_turn", turn, object_feature_names)
    name = c.get("refine_turn.file")
    if name != "turn.onnx":
        c.fail("refine_turn.file", name, "'turn.onnx'")
    if not isinstance(files.get(name), str) or not _HEX64.match(files[name]):
        c.fail(f"files.{name}", files.get(name), "a sha256 of 64 hex digits")


def check_card(card, source, *, onnx_files, class_names, object_feature_names, assembly_fields):
    """Check a parsed model card against the schema; raise :class:`ModelError` on the first breach.

    Parameters
    ----------
    card : object
        The parsed ``model.json``.
    source : str
        The card's path, for messages.
    onnx_files : tuple of str
        ONNX files every model folder holds (each must have a sha256 in ``files``).
    class_names : tuple of str
    object_feature_names : tuple of str
        Names the object classifier and direction-confidence model may read.
    assembly_fields : dict of str to type
        Fields of :class:`detector.objects.assemble.AssemblyParams` and their types.
    """
    c = _Checker(card, source)
    if not isinstance(card, dict):
        raise ModelError(f"{source} holds a {type(card).__name__}, not a JSON object.")
    names = c.names("class_names", c.get("class_names"))
    if tuple(names) != tuple(class_names):
        c.fail("class_names", names, f"{list(class_names)!r}")
    if not isinstance(c.get("feature_spec"), dict):
        c.fail("feature_spec", c.get("feature_spec"), "an object")
    features = c.names("feature_names", c.get("feature_names"))
    orientation = c.names("orientation_features", c.get("orientation_features"), allowed=set(features))
    c.names("odd_features", c.get("odd_features"), allowed=set(orientation))
    c.number("calibration.temperature", c.get("calibration.temperature"), lo=0.0, lo_open=True)
    c.numbers("calibration.bias", c.get("calibration.bias"), length=len(class_names))

    assembly = c.get("assembly")
    if not isinstance(assembly, dict):
        c.fail("assembly", assembly, "an object")
    for key, kind in assembly_fields.items():
        if key not in assembly:
            continue  # the code's default applies
        where = f"assembly.{key}"
        if key in ("min_score", "deposit_seed"):  # probabilities
            c.number(where, assembly[key], lo=0.0, hi=1.0)
        elif key in ("seed_k", "broad_seed_k", "grow_k", "grow_smooth_px", "vent_smooth_px",
                     "split_min_separation_deg", "split_min_share"):
            c.number(where, assembly[key], lo=0.0)
        else:
            c.number(where, assembly[key], lo=0.0 if kind is not int else 1.0, integer=kind is int)

    files = c.get("files")
    if not isinstance(files, dict):
        c.fail("files", files, "an object of file name -> sha256")
    for name in onnx_files:
        if name not in files:
            raise ModelError(f"{source} lacks the field 'files.{name}' (the sha256 of {name}).")
        if not isinstance(files[name], str) or not _HEX64.match(files[name]):
            c.fail(f"files.{name}", files[name], "a sha256 of 64 hex digits")
    c.names("object_features", c.get("object_features"), allowed=set(object_feature_names))

    confidence = c.get("direction_confidence", required=False)
    if confidence is not None:
        if not isinstance(confidence, dict):
            c.fail("direction_confidence", confidence, "an object or null")
        used = c.names("direction_confidence.features", c.get("direction_confidence.features"),
                       allowed=set(object_feature_names))
        for key in ("mean", "coef"):
            c.numbers(f"direction_confidence.{key}", c.get(f"direction_confidence.{key}"), length=len(used))
        c.numbers("direction_confidence.scale", c.get("direction_confidence.scale"), length=len(used),
                  lo=0.0, lo_open=True)
        c.number("direction_confidence.intercept", c.get("direction_confidence.intercept"))
        c.number("direction_confidence.bound_deg", c.get("direction_confidence.bound_deg"), lo=0.0, lo_open=True,
                 hi=180.0)

    refine = c.get("refine_model", required=False)
    if refine is not None:
        _check_refine_model(c, refine, tuple(object_feature_names))
    turn = c.get("refine_turn", required=False)
    if turn is not None:
        _check_refine_turn(c, turn, tuple(object_feature_names), files)

    noise = c.get("noise", required=False)
    if noise is not None:
        if not isinstance(noise, dict):
            c.fail("noise", noise, "an object or null")
        limit = c.number("noise.limit", c.get("noise.limit"), lo=0.0, lo_open=True, hi=1.0)
        c.number("noise.target", c.get("noise.target"), lo=0.0, lo_open=True, hi=limit)

    scale = c.get("pixel_scale", required=False)
    if scale is not None:
        if not isinstance(scale, dict):
            c.fail("pixel_scale", scale, "an object or null")
        lo = c.number("pixel_scale.min", c.get("pixel_scale.min"), lo=0.0, lo_open=True)
        hi = c.number("pixel_scale.max", c.get("pixel_scale.max"), lo=lo)
        c.number("pixel_scale.metres_per_px", c.get("pixel_scale.metres_per_px"), lo=lo, hi=hi)
        c.number("pixel_scale.tolerance", c.get("pixel_scale.tolerance"), lo=0.0)

    stats = c.get("unfamiliarity", required=False)
    if stats is not None:
        if not isinstance(stats, dict):
            c.fail("unfamiliarity", stats, "an object or null")
        mean = c.numbers("unfamiliarity.mean", c.get("unfamiliarity.mean"))
        n = len(mean)
        c.numbers("unfamiliarity.scale", c.get("unfamiliarity.scale"), length=n, lo=0.0, lo_open=True)
        comps = c.get("unfamiliarity.components")
        if not isinstance(comps, list) or not comps:
            c.fail("unfamiliarity.components", comps, "a non-empty list of rows")
        for i, row in enumerate(comps):
            c.numbers(f"unfamiliarity.components[{i}]", row, length=n)
        c.numbers("unfamiliarity.variances", c.get("unfamiliarity.variances"), length=len(comps), lo=0.0, lo_open=True)
        c.number("unfamiliarity.resid_scale", c.get("unfamiliarity.resid_scale"), lo=0.0, lo_open=True)
        c.number("unfamiliarity.threshold", c.get("unfamiliarity.threshold"), lo=0.0, lo_open=True)
