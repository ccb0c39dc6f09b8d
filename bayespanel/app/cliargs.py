"""The command line's vocabulary: its exit codes and how option values are read (names
lists, the delimiter, priors, NAME=NUMBER pairs), shared by the parser and the verbs."""

from __future__ import annotations

from ..core.errors import SpecificationError

#: exit codes (docs/cli.md): success, failure or interrupted, bad input, sampling problems
#: under --strict
EXIT_OK, EXIT_FAILURE, EXIT_BAD_INPUT, EXIT_SAMPLING = 0, 1, 2, 3


def _names(text):
    if text is None:
        return None
    text = text.strip()
    if text.lower() == "none":
        return ()
    return tuple(x.strip() for x in text.split(",") if x.strip())


_DELIMITER_NAMES = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "pipe": "|",
                    "space": " "}
_DELIMITER_HELP = ("field delimiter of a CSV file: one character such as ';' or '|', or tab, "
                   "comma, semicolon, pipe, space (default ',', tab for .tsv)")


def _delimiter(text):
    """``--delimiter``: one character, or its name (``tab`` is easier to type than a tab)."""
    return None if text is None else _DELIMITER_NAMES.get(text.lower(), text)


def delimiter_option(text):
    """``--delimiter`` of describe and design-check, checked (fit checks it in Settings)."""
    delim = _delimiter(text)
    if delim is not None and len(delim) != 1:
        raise SpecificationError(f"--delimiter {text!r} must be one character, or tab, "
                                 "comma, semicolon, pipe, space")
    return delim


def parse_prior(text: str):
    """``KEY=FAMILY`` or ``KEY=FAMILY:param=value,param=value`` -> (key, spec)."""
    if "=" not in text:
        raise SpecificationError(
            f"--prior {text!r} must look like KEY=FAMILY or KEY=FAMILY:param=value, e.g. "
            "sigma_unit=gamma2 or 'coef=normal:sigma=10'")
    key, spec = text.split("=", 1)
    key, spec = key.strip(), spec.strip()
    if ":" not in spec:
        return key, spec
    family, params = spec.split(":", 1)
    out = {"family": family.strip()}
    for part in params.split(","):
        if not part.strip():
            continue
        if "=" not in part:
            raise SpecificationError(f"--prior {text!r}: parameter {part.strip()!r} needs a "
                                     "value, as in sigma=10")
        k, v = part.split("=", 1)
        try:
            out[k.strip()] = float(v)
        except ValueError:
            raise SpecificationError(f"--prior {text!r}: {k.strip()}={v.strip()!r} is not a "
                                     "number") from None
    return key, out


def _pairs(items, option):
    out = {}
    for text in items or []:
        if "=" not in text:
            raise SpecificationError(f"{option} {text!r} must look like NAME=NUMBER")
        k, v = text.rsplit("=", 1)
        try:
            out[k.strip()] = float(v)
        except ValueError:
            raise SpecificationError(f"{option} {text!r}: {v.strip()!r} is not a number") from None
    return out
