"""``ensemble inspect``: summarise an archive and check it against the format."""

from __future__ import annotations

import argparse
import json

EXAMPLES = """examples:
  ensemble inspect lab.h5
  ensemble inspect lab.h5 --events 20
  ensemble inspect lab.h5 --json
"""

CAUTION = ("steering figures are advisory: apply a correction only after operator review, "
           "gradually and within the laboratory's limits and procedures")


def add_parser(sub, parents) -> None:
    p = sub.add_parser("inspect", parents=parents, help="summarise and verify an archive",
                       description="Print an archive's span, each clock's standing and weight "
                                   "at the last epoch, recent events, the latest steering, the "
                                   "runs that wrote it, and whether it conforms to its format "
                                   "version. Exit 0 if it conforms, 2 if not.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("archive", metavar="ARCHIVE.h5", help="archive written by ensemble run")
    p.add_argument("--events", type=int, default=10, metavar="N",
                   help="number of most recent events to list (default 10)")
    p.add_argument("--runs", type=int, default=5, metavar="N",
                   help="number of most recent runs to list (default 5)")
    p.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    p.set_defaults(func=main)


def _iso(mjd: float) -> str:
    import datetime as dt

    from ..units import MJD_UNIX_EPOCH, SECONDS_PER_DAY
    stamp = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc) + dt.timedelta(
        seconds=round((mjd - MJD_UNIX_EPOCH) * SECONDS_PER_DAY))
    return stamp.strftime("%Y-%m-%dT%H:%M:%SZ")


def _number(x):
    """A float for JSON: None for NaN."""
    x = float(x)
    return None if x != x else x


def _last_seen(a, mjd) -> list:
    """Last epoch [MJD] with a finite offset, per clock (None if never), read from the end."""
    import numpy as np

    found: list = [None] * len(a.clocks)
    stop = len(mjd)
    while stop > 0 and any(v is None for v in found):
        start = max(0, stop - 4096)
        offsets = a.array("/scale/offset", float(mjd[start]), float(mjd[stop - 1]))
        for j in range(len(found)):
            if found[j] is None:
                rows = np.flatnonzero(np.isfinite(offsets[:, j]))
                if len(rows):
                    found[j] = float(mjd[start + rows[-1]])
        stop = start
    return found


def summarise(path, n_events: int = 10, n_runs: int = 5) -> dict:
    """The content of ``ensemble inspect`` as a dict (what ``--json`` prints).

    Offsets are in s, frequencies dimensionless, drift per day, as in the archive.
    """
    import os

    import numpy as np

    from ..archive import open_archive
    from ..archive.schema import STATE_CODES
    from ..archive.verify import verify_archive

    with open_archive(path) as a:
        attrs = a.attrs
        mjd = a.mjd
        out: dict = {
            "archive": str(path),
            "size_bytes": os.path.getsize(path),
            "format_version": attrs.get("format_version"),
            "software_version": attrs.get("software_version"),
            "created_utc": attrs.get("created_utc"),
            "n_epochs": int(len(mjd)),
        }
        if len(mjd):
            steps = np.diff(mjd) * 86400.0
            out["span"] = {"first_mjd": float(mjd[0]), "last_mjd": float(mjd[-1]),
                           "first_utc": _iso(mjd[0]), "last_utc": _iso(mjd[-1]),
                           "interval_s": float(np.round(np.median(steps))) if len(steps) else None}
        else:
            out["span"] = None
        codes = a.state_codes or STATE_CODES
        clocks = []
        if len(mjd):
            t = float(mjd[-1])
            rows = {name: a.array(f"/scale/{name}", t, t)[0]
                    for name in ("offset", "frequency", "drift", "weight", "state")}
            seen = _last_seen(a, mjd)
            for j, clock in enumerate(a.clocks):
                clocks.append({
                    "clock": clock,
                    "state": codes.get(int(rows["state"][j]), str(int(rows["state"][j]))),
                    "weight": _number(rows["weight"][j]),
                    "offset_s": _number(rows["offset"][j]),
                    "frequency": _number(rows["frequency"][j]),
                    "drift_per_day": _number(rows["drift"][j]),
                    "last_seen_mjd": seen[j],
                })
        else:
            clocks = [{"clock": c, "state": None, "weight": None} for c in a.clocks]
        out["clocks"] = clocks
        events = a.events
        kinds = events["kind"].value_counts().sort_index().to_dict() if len(events) else {}
        recent = events.tail(max(0, n_events)) if n_events > 0 else events.iloc[0:0]
        out["events"] = {
            "count": int(len(events)),
            "by_kind": {k: int(v) for k, v in kinds.items()},
            "recent": [{"mjd": float(r.mjd), "utc": _iso(r.mjd), "clock": r.clock,
                        "kind": r.kind, "magnitude": _number(r.magnitude),
                        "score": _number(r.score)} for r in recent.itertuples()],
        }
        steering = a.steering
        if len(steering):
            last_row = steering.iloc[-1]
            out["steering"] = {
                "count": int(len(steering)),
                "last_mjd": float(last_row["mjd"]),
                "last_utc": _iso(last_row["mjd"]),
                "frequency_correction": _number(last_row["frequency_correction"]),
                "total_frequency_correction": _number(steering["frequency_correction"].sum()),
                "phase_error_s": _number(last_row["phase_error"]),
                "caution": CAUTION,
            }
        else:
            out["steering"] = {"count": 0, "caution": CAUTION}
        prov = a.provenance
        out["run_count"] = int(len(prov))
        prov = prov.tail(n_runs) if n_runs > 0 else prov.iloc[0:0]
        out["runs"] = [{"time_utc": r.time_utc, "software_version": r.software_version,
                        "mode": r.mode, "input_name": r.input_name,
                        "input_sha256": r.input_sha256, "epochs_added": int(r.epochs_added),
                        "first_mjd": _number(r.first_mjd), "last_mjd": _number(r.last_mjd)}
                       for r in prov.itertuples()]
    problems = verify_archive(path)
    out["conformant"] = not problems
    out["problems"] = problems
    return out


def _fmt(x, spec: str, unit: str = "") -> str:
    if x is None:
        return "-"
    return f"{x:{spec}}{unit}"


def render(s: dict) -> str:
    """The text of ``ensemble inspect`` for the dict of :func:`summarise`."""
    lines = [f"archive    {s['archive']}  ({s['size_bytes'] / 1e6:.2f} MB, format "
             f"{s['format_version']}, last written by ensemble {s['software_version']}, "
             f"created {s['created_utc']})"]
    span = s["span"]
    if span:
        interval = span["interval_s"]
        step = (f", every {interval / 3600:g} h" if interval and interval >= 3600
                else f", every {interval:g} s" if interval else "")
        lines.append(f"span       MJD {span['first_mjd']:.6f} to {span['last_mjd']:.6f}  "
                     f"({span['first_utc']} to {span['last_utc']}), {s['n_epochs']} epochs{step}")
    else:
        lines.append("span       no epochs")
    lines.append(f"clocks     {len(s['clocks'])} (at the last epoch)")
    lines.append(f"  {'clock':<12} {'standing':<10} {'weight':>7} {'offset':>12} "
                 f"{'frequency':>11} {'drift/d':>11}")
    for c in s["clocks"]:
        offset = None if c.get("offset_s") is None else c["offset_s"] * 1e9
        lines.append(f"  {c['clock']:<12} {c['state'] or '-':<10} "
                     f"{_fmt(c['weight'], '7.4f'):>7} {_fmt(offset, '+9.3f', ' ns'):>12} "
                     f"{_fmt(c.get('frequency'), '+11.3e'):>11} "
                     f"{_fmt(c.get('drift_per_day'), '+11.3e'):>11}")
    ev = s["events"]
    kinds = ", ".join(f"{k} {v}" for k, v in ev["by_kind"].items()) or "none"
    lines.append(f"events     {ev['count']} ({kinds})")
    for e in ev["recent"]:
        lines.append(f"  {e['utc']}  {e['clock']:<12} {e['kind']:<16} "
                     f"magnitude {_fmt(e['magnitude'], '+.3e')}  score {_fmt(e['score'], '.1f')}")
    st = s["steering"]
    if st["count"]:
        error_ns = None if st["phase_error_s"] is None else st["phase_error_s"] * 1e9
        lines.append(f"steering   last command {st['last_utc']} (MJD {st['last_mjd']:.6f}): "
                     f"{_fmt(st['frequency_correction'], '+.3e')}; total "
                     f"{_fmt(st['total_frequency_correction'], '+.3e')} over {st['count']} "
                     f"commands; phase error {_fmt(error_ns, '+.3f', ' ns')}")
    else:
        lines.append("steering   no commands")
    lines.append(f"           ({st['caution']})")
    shown = f", the last {len(s['runs'])}:" if len(s["runs"]) < s["run_count"] else ""
    lines.append(f"runs       {s['run_count']}{shown}")
    for r in s["runs"]:
        lines.append(f"  {r['time_utc']}  {r['mode']:<6} ensemble {r['software_version']:<8} "
                     f"+{r['epochs_added']} epochs  {r['input_name']}  "
                     f"sha256 {r['input_sha256'][:12]}")
    if s["conformant"]:
        lines.append(f"verdict    conforms to archive format {s['format_version']}")
    else:
        lines.append(f"verdict    does NOT conform to archive format {s['format_version']}: "
                     f"{len(s['problems'])} problem(s)")
        lines.extend(f"  - {p}" for p in s["problems"])
    return "\n".join(lines)


def main(args: argparse.Namespace) -> int:
    import sys

    from ..errors import InputError

    for option, value in (("--events", args.events), ("--runs", args.runs)):
        if value < 0:
            raise InputError(f"{option} {value}: expected a count >= 0")
    summary = summarise(args.archive, args.events, args.runs)
    if args.json:
        print(json.dumps(summary, indent=2))
    else:
        print(render(summary))
    if not summary["conformant"]:
        print(f"error: {args.archive}: archive does not conform to format "
              f"{summary['format_version']} ({len(summary['problems'])} problem(s) listed above)",
              file=sys.stderr)
        return 2
    return 0
