"""``ensemble stability``: a stability table (deviation, EDF, confidence interval) of one series.

Input file: one value per line, phase in seconds or fractional frequency (dimensionless).

* Lines whose first non-blank character is ``#`` are comments; they are skipped and are not
  samples.
* The first line that is neither blank nor a comment may be a header (a word starting with a
  letter, e.g. ``phase_s``); it is skipped.
* A blank line or ``nan`` is a missing sample (a gap in the time series).  Missing samples
  before the first number and after the last one are dropped: the record runs from its first
  to its last value.
* Anything else must be one decimal number (``1.25e-9``); a second field, a decimal comma or
  ``inf`` is refused with the line number.
"""

from __future__ import annotations

import argparse
import re

from ..errors import InputError

STATISTIC_CHOICES = ("adev", "oadev", "mdev", "tdev", "hdev", "ohdev", "totdev")

EXAMPLES = """examples:
  ensemble stability phase.txt --statistic oadev --tau0 1 --input phase
  ensemble stability freq.csv --statistic mdev --tau0 0.5 --input frequency --taus decade --json
  ensemble stability phase.txt --statistic tdev --tau0 60 --input phase --taus 60,600,3600 \\
      --plot tdev.png

input: one value per line; '#' lines are comments; an optional first-line header; a blank
line or 'nan' is a missing sample.
"""

_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d+,\d+([eE][+-]?\d+)?$")
_HEADER = re.compile(r"^[A-Za-z][A-Za-z0-9_ .()\[\]/*^+-]*$")


def add_parser(sub, parents) -> None:
    p = sub.add_parser(
        "stability", parents=parents,
        help="stability table of one phase or frequency series",
        description="Compute a frequency-stability deviation at several averaging times, with "
                    "the number of terms, the identified noise type, the equivalent degrees "
                    "of freedom and a chi-squared confidence interval.",
        epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("input", metavar="INPUT", help="text or CSV file with one column of values")
    p.add_argument("--statistic", required=True, choices=STATISTIC_CHOICES,
                   help="adev/oadev: Allan (non-overlapping/overlapping); mdev: modified "
                        "Allan; tdev: time deviation [s]; hdev/ohdev: Hadamard; totdev: total")
    p.add_argument("--tau0", required=True, metavar="SECONDS",
                   help="sampling interval of the series [s]")
    p.add_argument("--input", dest="data", required=True, choices=("phase", "frequency"),
                   help="the values are phase [s] or fractional frequency [1]")
    p.add_argument("--taus", default="octave", metavar="octave|decade|all|LIST",
                   help="averaging times: octave (m = 1, 2, 4, ...; default), decade "
                        "(1, 2, 5, 10, 20, 50, ...), all, or a comma-separated list of "
                        "seconds, each a multiple of tau0")
    p.add_argument("--confidence", default=None, metavar="P",
                   help="two-sided probability of the interval (default 0.6826894921, the "
                        "68.3 %% interval)")
    p.add_argument("--noise", default="auto", type=str.upper,
                   choices=("AUTO", "WPM", "FPM", "WFM", "FFM", "RWFM", "FWFM", "RRFM"),
                   help="noise type for the EDF at every tau instead of identifying it per tau "
                        "(white/flicker PM, white/flicker/random-walk FM; FWFM and RRFM with "
                        "hdev/ohdev only); default auto")
    p.add_argument("--json", action="store_true",
                   help="print a JSON list of objects: tau, deviation, n, edf, lo, hi, "
                        "alpha, noise")
    p.add_argument("--plot", metavar="FILE.png",
                   help="also write a log-log plot with the intervals and noise types")
    p.set_defaults(func=main)


# --------------------------------------------------------------------------------------------
# Input file


def read_values(path: str) -> tuple[list[float], list[int]]:
    """Read one column of values.

    Returns
    -------
    (list of float, list of int)
        The samples (NaN for a missing one) and the 1-based line number of each sample.
    """
    try:
        with open(path, encoding="utf-8-sig", newline=None) as fh:
            lines = fh.read().split("\n")
    except FileNotFoundError:
        raise InputError("file not found", path=path) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a file", path=path) from None
    except UnicodeDecodeError:
        raise InputError("not a UTF-8 text file", path=path) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror}", path=path) from None
    values: list[float] = []
    rows: list[int] = []
    header_allowed = True
    column = None
    for lineno, raw in enumerate(lines, start=1):
        text = raw.strip()
        if text.startswith("#"):
            continue
        if not text:
            values.append(float("nan"))
            rows.append(lineno)
            continue
        token = text
        if "," in text or ";" in text or "\t" in text:
            fields = re.split(r"[,;\t]", text)
            if len(fields) > 1:
                hint = (" (a decimal comma? write a decimal point)"
                        if _DECIMAL_COMMA.match(text) else "")
                raise InputError(f"found {len(fields)} fields {text!r}; expected one value per "
                                 f"line{hint}", path=path, row=lineno, column=column)
        if len(token) >= 2 and token[0] == token[-1] == '"':
            token = token[1:-1].strip()
        low = token.lower()
        if low == "nan":
            values.append(float("nan"))
            rows.append(lineno)
            header_allowed = False
            continue
        if _NUMBER.match(token):
            values.append(float(token))
            rows.append(lineno)
            header_allowed = False
            continue
        if header_allowed and _HEADER.match(token) and low not in ("inf", "infinity"):
            header_allowed = False
            column = token
            values.clear()
            rows.clear()
            continue
        what = "is infinite" if low.lstrip("+-") in ("inf", "infinity") else "is not a number"
        raise InputError(f"{token!r} {what}; write one decimal number per line (e.g. 1.25e-9), "
                         "or leave the line blank for a missing value",
                         path=path, row=lineno, column=column)
    # drop missing samples before the first and after the last number
    first = next((k for k, v in enumerate(values) if v == v), None)
    if first is None:
        raise InputError("no values found; expected one number per line", path=path)
    last = max(k for k, v in enumerate(values) if v == v)
    return values[first:last + 1], rows[first:last + 1]


def _parse_taus(text: str):
    word = text.strip().lower()
    if word in ("octave", "decade", "all"):
        return word
    parts = [p.strip() for p in text.split(",")]
    taus = []
    for p in parts:
        if not p:
            raise InputError(f"--taus {text!r}: empty item; give octave, decade, all or "
                             "comma-separated seconds such as 1,10,100")
        try:
            taus.append(float(p))
        except ValueError:
            raise InputError(f"--taus {text!r}: {p!r} is not a number of seconds; give octave, "
                             "decade, all or comma-separated seconds such as 1,10,100") from None
    return taus


def _parse_float(text: str, option: str) -> float:
    try:
        return float(text)
    except (TypeError, ValueError):
        raise InputError(f"{option} {text!r} is not a number") from None


# --------------------------------------------------------------------------------------------
# Output


_METHOD_WORDS = {"lag1": "lag-1 autocorrelation",
                 "lag1+rn": "lag-1 autocorrelation, PM split by MVAR/AVAR", "b1": "B1 ratio",
                 "b1+rn": "B1 ratio, PM split by MVAR/AVAR", "b1+r1": "B1 ratio, PM split by lag-1",
                 "carried": "from a shorter tau", "default": "too few values: white FM assumed",
                 "given": "set by --noise"}


def format_table(rows, *, statistic: str, source: str, n_values: int, data: str,
                 tau0_s: float, confidence: float) -> str:
    """The human-readable table printed without --json."""
    from ..stability.noiseid import NOISE_CODES, NOISE_NAMES
    from ..stability.plot import STATISTIC_LABELS

    pct = f"{100 * confidence:.1f} %"
    lines = [f"{statistic}: {STATISTIC_LABELS[statistic]}",
             f"  {source}: {n_values} {data} values, tau0 = {tau0_s:g} s",
             f"  low, high: {pct} confidence interval (chi-squared with the EDF of the noise "
             "type at each tau)",
             ""]
    cols = (f"{'tau [s]':>12}  {'deviation':>12}  {'low':>11}  {'high':>11}  "
            f"{'terms':>8}  {'EDF':>9}  noise")
    lines += [cols, "-" * (len(cols) + 8)]
    for r in rows:
        lines.append(f"{r.tau_s:>12.6g}  {r.deviation:>12.5e}  {r.lo:>11.4e}  {r.hi:>11.4e}  "
                     f"{r.n:>8d}  {r.edf:>9.2f}  {r.noise_code:<4} {r.noise_method}")
    alphas = sorted({r.alpha for r in rows}, reverse=True)
    methods = list(dict.fromkeys(r.noise_method for r in rows))
    lines.append("")
    lines.append("noise: " + ", ".join(f"{NOISE_CODES[a]} {NOISE_NAMES[a]}" for a in alphas)
                 + "; found by " + ", ".join(f"{k}: {_METHOD_WORDS[k]}" for k in methods))
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    import json
    import math

    from ..stability.confidence import CONFIDENCE_68, check_confidence
    from ..stability.deviations import check_tau0
    from ..stability.noiseid import NOISE_CODES
    from ..stability.table import stability_table

    tau0 = check_tau0(_parse_float(args.tau0, "--tau0"))
    taus = _parse_taus(args.taus)
    confidence = CONFIDENCE_68
    if args.confidence is not None:
        confidence = check_confidence(_parse_float(args.confidence, "--confidence"))
    alpha = None
    if args.noise != "AUTO":
        alpha = {code: a for a, code in NOISE_CODES.items()}[args.noise]
    values, _ = read_values(args.input)
    try:
        rows = stability_table(values, tau0, args.statistic, data=args.data, taus=taus,
                               confidence=confidence, alpha=alpha)
    except InputError as exc:
        raise InputError(exc.reason, path=args.input) from None
    if args.plot:
        from ..stability.plot import plot_stability
        plot_stability(rows, args.plot, statistic=args.statistic, confidence=confidence,
                       title=f"{args.statistic} of {args.input} (tau0 = {tau0:g} s)")
    if args.json:
        out = [r.as_dict() for r in rows]
        for obj in out:
            for key, val in obj.items():
                if isinstance(val, float) and not math.isfinite(val):
                    raise RuntimeError(f"non-finite {key} in the stability table")
        print(json.dumps(out, indent=1))
    else:
        print(format_table(rows, statistic=args.statistic, source=args.input,
                           n_values=len(values), data=args.data, tau0_s=tau0,
                           confidence=confidence))
    return 0
