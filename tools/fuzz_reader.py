"""Long fuzz run of the spectrum reader: mutated demo exports, counted outcomes.

Usage::

    python tools/fuzz_reader.py -n 20000 --seed 1 [--time-limit 5] [--save DIR]

Every input is a demo file under ``demo_data/`` mutated by lines or bytes (junk
tokens, separators, decimal marks, encodings, NaN/inf, truncation, extra
columns, stray text lines, repeated blocks). Each is read by
:func:`fitting.reader.parse_spectrum` in a worker process; the run counts

* **parsed**: a spectrum came back and passed every check below;
* **named errors**: a :class:`~fitting.errors.PellucidError` naming the input;
* **crashes**: any other exception;
* **hangs**: no answer within ``--time-limit`` seconds (the worker is killed);
* **invalid parses**: a spectrum that breaks an invariant (finite, positive,
  strictly ascending wavelengths; finite values and sigma; at least 5 points),
  or, for mutations whose right answer is known (a stray text, comment or
  blank line between data rows; a last line cut short without a line break),
  an answer that differs from it.

The exit status is 1 if any crash, hang or invalid parse was seen, else 0.
Failing inputs are written to ``--save`` (default: a temporary folder) so
they can be replayed with ``python -m fitting.reader FILE``.

The mutation functions are also used, a few hundred at a time, by
``tests/test_reader_fuzz.py``.
"""

from __future__ import annotations

import argparse
import codecs
import multiprocessing as mp
import random
import re
import sys
import tempfile
import time
import traceback
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
DEMO_SUFFIXES = (".csv", ".txt", ".dat")

#: Tokens a damaged or unusual export may hold where a number belongs.
JUNK_TOKENS = ("-nan", "nan", "NaN", "inf", "-inf", "Infinity", "1e999", "-1e999",
               "100000000000", "0", "-0", "-5", "0.0", "1e-320", "5e-324", "1e308", "0x10",
               "", "--", '"', '""', "1,2", "1.2.3", "1·5", "·", "−3", "１２", "٣", "N/A",
               "#VALUE!", "PMT", "InGaAs", "Lamp change", "5O", "4OO.5", "e5", ".", ",",
               "+", "1e", "9" * 40)
#: Whole lines a fuzzer inserts or substitutes.
JUNK_LINES = ("Lamp change", "Detector change", "# comment", "", "   ", "[Data]", "end",
              "Wavelength (nm);T (%)", "nan;nan", "-nan\t-nan", "100000000000",
              "0;0", "0,0", "-1 50", "inf,inf", "1e999\t1e999", ";;;;", ",,,,", "\t\t",
              '"500,5","81,25"', "x;3", "1;a", "\ufeff", "##XYDATA=(X++(Y..Y))",
              "Points: 801", "=" * 30)
#: Text lines with a known right answer: skipped, the rest read as without them.
NEUTRAL_LINES = ("Lamp change", "Detector change at 860 nm", "# note", "", "Grating change")
SEPARATORS = ("\t", ";", ",", " ", "  ", "|", ":")


# ----------------------------------------------------------------------------- corpus

def demo_files() -> list[tuple[str, bytes]]:
    """(name, bytes) of every spectrum table shipped under ``demo_data/``."""
    return [(str(p.relative_to(ROOT)), p.read_bytes())
            for p in sorted((ROOT / "demo_data").rglob("*")) if p.suffix in DEMO_SUFFIXES]


def _codec(raw: bytes) -> tuple[str, bytes]:
    """(codec, byte-order mark) the demo file was written in, to re-encode after edits."""
    for bom, codec in ((codecs.BOM_UTF16_LE, "utf-16-le"), (codecs.BOM_UTF16_BE, "utf-16-be"),
                       (codecs.BOM_UTF8, "utf-8")):
        if raw.startswith(bom):
            return codec, bom
    return "utf-8", b""


def _decode(raw: bytes) -> tuple[str, str, bytes]:
    codec, bom = _codec(raw)
    return raw[len(bom):].decode(codec, errors="replace"), codec, bom


def _encode(text: str, codec: str, bom: bytes) -> bytes:
    return bom + text.encode(codec, errors="replace")


def _data_rows(lines: list[str]) -> list[int]:
    """Indices of the lines that start with a digit (the data block of a demo file)."""
    return [i for i, line in enumerate(lines) if line[:1].isdigit()]


# ----------------------------------------------------------------------------- mutations
# Each takes a random.Random and the file's bytes and returns (label, bytes, oracle).
# oracle is None (only the invariants are checked) or (kind, line, original): the right
# answer is the mutated file read without its 1-based ``line``; for kind "cut" the
# row may instead be kept if it matches the same row of ``original`` (the unmutated bytes).

def _line_edit(rng: random.Random, raw: bytes):
    text, codec, bom = _decode(raw)
    lines = text.split("\n")
    op = rng.choice(("delete", "duplicate", "swap", "insert", "replace", "token",
                     "columns", "separator", "decimal", "quote", "textcol"))
    i = rng.randrange(len(lines))
    if op == "delete":
        del lines[i]
    elif op == "duplicate":
        lines.insert(i, lines[i])
    elif op == "swap":
        j = rng.randrange(len(lines))
        lines[i], lines[j] = lines[j], lines[i]
    elif op == "insert":
        lines.insert(i, rng.choice(JUNK_LINES))
    elif op == "replace":
        lines[i] = rng.choice(JUNK_LINES)
    elif op == "token":
        for _ in range(rng.randint(1, 5)):
            k = rng.randrange(len(lines))
            parts = lines[k].split(rng.choice(("\t", ";", ",", " ")))
            parts[rng.randrange(len(parts))] = rng.choice(JUNK_TOKENS)
            lines[k] = rng.choice(("\t", ";", ",", " ")).join(parts)
    elif op == "columns":                     # extra columns on some or all rows
        extra = rng.choice(SEPARATORS).join(rng.choice(JUNK_TOKENS[:12])
                                             for _ in range(rng.randint(1, 8)))
        every = rng.choice((1, 1, 2, 50))
        sep = rng.choice(SEPARATORS)
        lines = [line + sep + extra if n % every == 0 else line for n, line in enumerate(lines)]
    elif op == "separator":
        a, b = rng.choice(SEPARATORS), rng.choice(SEPARATORS)
        lines = [line.replace(a, b) for line in lines]
    elif op == "quote":                       # "500,5","81,25" as spreadsheets write it
        comma = rng.random() < 0.5
        lines = [",".join(f'"{t.replace(".", ",") if comma else t}"'
                          for t in re.split(r"[\t;, ]+", line.strip()))
                 if line[:1].isdigit() else line for line in lines]
    elif op == "textcol":                     # a detector column of words
        sep = rng.choice(("\t", ";", ",", " "))
        words = rng.choice((("PMT", "InGaAs"), ("ok",), ("Si", "PbS", "")))
        front = rng.random() < 0.3
        lines = [(f"{rng.choice(words)}{sep}{line}" if front else
                  f"{line}{sep}{rng.choice(words)}") if line[:1].isdigit() else line
                 for line in lines]
    else:
        a, b = rng.choice(((".", ","), (",", "."), (".", "·"), (",", "·"), (".", ""),
                           (".", "'")))
        lines = [line.replace(a, b) if rng.random() < 0.7 else line for line in lines]
    return f"line:{op}", _encode("\n".join(lines), codec, bom), None


def _byte_edit(rng: random.Random, raw: bytes):
    data = bytearray(raw)
    op = rng.choice(("flip", "insert", "delete", "truncate", "nul", "reencode", "bom",
                     "newlines"))
    at = rng.randrange(len(data))
    if op == "flip":
        for _ in range(rng.randint(1, 8)):
            data[rng.randrange(len(data))] = rng.randrange(256)
    elif op == "insert":
        data[at:at] = bytes(rng.randrange(256) for _ in range(rng.randint(1, 16)))
    elif op == "delete":
        del data[at:at + rng.randint(1, 200)]
    elif op == "truncate":
        del data[at:]
    elif op == "nul":
        data[at:at] = b"\x00" * rng.randint(1, 4)
    elif op == "reencode":
        text, _, _ = _decode(raw)
        enc = rng.choice(("utf-16-le", "utf-16-be", "utf-32-le", "latin-1", "cp1252",
                          "utf-8-sig", "cp500"))
        data = bytearray(text.encode(enc, errors="replace"))
        if rng.random() < 0.5 and enc.startswith("utf-16"):
            data[0:0] = codecs.BOM_UTF16_LE if enc.endswith("le") else codecs.BOM_UTF16_BE
    elif op == "bom":
        data[at:at] = rng.choice((codecs.BOM_UTF8, codecs.BOM_UTF16_LE, codecs.BOM_UTF32_BE))
    else:
        data = bytearray(bytes(data).replace(b"\n", rng.choice((b"\r\n", b"\r", b"\n\n"))))
    return f"byte:{op}", bytes(data), None


def _neutral_line(rng: random.Random, raw: bytes):
    """A stray text, comment or blank line between two data rows: skipped, not read."""
    text, codec, bom = _decode(raw)
    lines = text.split("\n")
    rows = _data_rows(lines)
    at = rng.choice(rows[1:-1])
    lines.insert(at, rng.choice(NEUTRAL_LINES))
    return "oracle:stray-line", _encode("\n".join(lines), codec, bom), ("stray", at + 1, raw)


def _cut_last_row(rng: random.Random, raw: bytes):
    """The last row cut short, no line break after it: dropped (or harmlessly kept)."""
    text, codec, bom = _decode(raw)
    lines = text.rstrip("\n").split("\n")
    last = lines[-1]
    if len(last) < 2:
        return _neutral_line(rng, raw)
    lines[-1] = last[:rng.randrange(1, len(last))]
    return "oracle:cut-last-row", _encode("\n".join(lines), codec, bom), ("cut", len(lines), raw)


def _big(rng: random.Random, raw: bytes):
    """Megabytes: the data block repeated with hundreds of extra columns, or no table."""
    text, codec, bom = _decode(raw)
    lines = text.split("\n")
    if rng.random() < 0.5:
        rows = [lines[i] for i in _data_rows(lines)]
        sep = "\t" if "\t" in rows[0] else (";" if ";" in rows[0] else
                                            ("," if "," in rows[0] else " "))
        extra = sep + sep.join(["0.5"] * rng.choice((20, 500)))
        body = [r + extra for r in rows] * rng.choice((1, 4))
        return "big:columns", _encode("\n".join(lines[:12] + body), codec, bom), None
    words = "the quick lamp warms up slowly before the scan starts 12 345".split()
    filler = "\n".join(" ".join(rng.choice(words) for _ in range(12)) for _ in range(60_000))
    return "big:text", filler.encode("utf-8"), None


def mutate(rng: random.Random, raw: bytes):
    """One mutated input from a demo file's bytes: (label, bytes, oracle)."""
    r = rng.random()
    if r < 0.002:
        return _big(rng, raw)
    if r < 0.10:
        return _neutral_line(rng, raw)
    if r < 0.18:
        return _cut_last_row(rng, raw)
    out = raw
    labels = []
    for _ in range(rng.choice((1, 1, 2, 3))):
        label, out, _ = (_line_edit if rng.random() < 0.6 else _byte_edit)(rng, out)
        labels.append(label)
        if not out:
            break
    return "+".join(labels), out, None


# ----------------------------------------------------------------------------- checks

def invariant_problem(spec) -> str:
    """What is wrong with a parsed spectrum, or "" if it keeps every promise."""
    from fitting.reference import MIN_POINTS
    wl, v = spec.wavelength_nm, spec.values
    if len(spec) < MIN_POINTS:
        return f"{len(spec)} points"
    if not np.all(np.isfinite(wl)):
        return "non-finite wavelength"
    if not np.all(wl > 0):
        return f"non-positive wavelength {wl.min()!r}"
    if not np.all(np.diff(wl) > 0):
        return "wavelengths not strictly ascending"
    if not np.all(np.isfinite(v)):
        return "non-finite value"
    if spec.sigma is not None and not np.all(np.isfinite(spec.sigma) & (spec.sigma > 0)):
        return "sigma not finite and positive"
    return ""


def reference_input(raw: bytes, oracle) -> bytes:
    """The mutated input without the line the oracle says must not count."""
    _, drop, _ = oracle
    text, codec, bom = _decode(raw)
    lines = text.split("\n")
    return _encode("\n".join(lines[:drop - 1] + lines[drop:]), codec, bom)


def oracle_problem(spec, want, raw: bytes, oracle, options) -> str:
    """Difference of ``spec`` from ``want``, the known right answer, or ""."""
    from fitting.reader import parse_spectrum
    kind, drop, original = oracle
    line = _decode(raw)[0].split("\n")[drop - 1]
    if len(spec) == len(want) and np.allclose(spec.wavelength_nm, want.wavelength_nm,
                                              rtol=1e-12) \
            and np.allclose(spec.values, want.values, rtol=1e-12, atol=0):
        if line.strip() and not line.lstrip().startswith("#") \
                and not any(f"line {drop}" in w for w in spec.warnings):
            return f"line {drop} ({line[:30]!r}) skipped without a note naming it"
        return ""
    if kind == "cut" and len(spec) == len(want) + 1:
        # The cut kept the row: harmless only if it lost no digit that matters.
        extra = np.setdiff1d(spec.wavelength_nm, want.wavelength_nm)
        if extra.size == 1:
            full = parse_spectrum(original, options=options)
            i = int(np.searchsorted(spec.wavelength_nm, extra[0]))
            j = np.flatnonzero(np.isclose(full.wavelength_nm, extra[0], rtol=1e-9))
            if j.size and np.isclose(full.values[j[0]], spec.values[i], rtol=1e-3, atol=1e-5):
                return ""
            return (f"cut last line {line!r} read as {float(spec.values[i]):g} at "
                    f"{float(extra[0]):g} nm")
    return f"{len(spec)} points read, {len(want)} expected (line {drop}, {line[:30]!r}, " \
           "should not count)"


# ----------------------------------------------------------------------------- worker

def _worker(conn):
    from fitting.errors import PellucidError
    from fitting.reader import ReaderOptions, parse_spectrum
    options = (ReaderOptions(), ReaderOptions(sigma="estimate"),
               ReaderOptions(y_kind="counts"), ReaderOptions(decimal=","))
    while True:
        job = conn.recv()
        if job is None:
            return
        raw, oracle, k = job
        opts = options[k % len(options)]
        want = None
        if oracle is not None:
            try:
                want = parse_spectrum(reference_input(raw, oracle), options=opts)
            except PellucidError:
                oracle = None           # the file is refused without the line too
        t0 = time.process_time()
        try:
            spec = parse_spectrum(raw, options=opts, source="<fuzz>")
        except PellucidError as exc:
            text = str(exc)
            if not text.startswith("<fuzz>"):
                outcome = ("crash", f"error without the input's name: {text[:200]}")
            elif oracle is not None:
                outcome = ("invalid", f"refused, but reads without line {oracle[1]}: "
                                      f"{text[:300]}")
            else:
                outcome = ("error", "")
        except Exception:               # noqa: BLE001 - counting crashes is the point
            outcome = ("crash", traceback.format_exc(limit=6))
        else:
            problem = invariant_problem(spec)
            if not problem and oracle is not None:
                problem = oracle_problem(spec, want, raw, oracle, opts)
            outcome = ("invalid", problem) if problem else ("parsed", "")
        conn.send((outcome, time.process_time() - t0))


class _Runner:
    def __init__(self):
        self.ctx = mp.get_context("fork" if sys.platform != "win32" else "spawn")
        self._start()

    def _start(self):
        self.conn, child = self.ctx.Pipe()
        self.proc = self.ctx.Process(target=_worker, args=(child,), daemon=True)
        self.proc.start()

    def run(self, job, limit: float):
        self.conn.send(job)
        if self.conn.poll(limit):
            return self.conn.recv()
        self.proc.kill()
        self.proc.join()
        self._start()
        return ("hang", f"no answer within {limit:g} s"), limit

    def close(self):
        self.conn.send(None)
        self.proc.join(5)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("-n", type=int, default=20_000, help="number of inputs (default 20000)")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--time-limit", type=float, default=5.0,
                    help="seconds per input before it counts as a hang (default 5)")
    ap.add_argument("--save", type=Path, default=None,
                    help="folder for failing inputs (default: a temporary folder)")
    args = ap.parse_args(argv)
    rng = random.Random(args.seed)
    corpus = demo_files()
    save = args.save or Path(tempfile.mkdtemp(prefix="pellucid-fuzz-"))
    save.mkdir(parents=True, exist_ok=True)
    counts = {"parsed": 0, "error": 0, "crash": 0, "hang": 0, "invalid": 0}
    cpu = []
    slowest = (0.0, "")
    runner = _Runner()
    t0 = time.perf_counter()
    try:
        for k in range(args.n):
            name, raw = corpus[rng.randrange(len(corpus))]
            label, data, oracle = mutate(rng, raw)
            (kind, detail), seconds = runner.run((data, oracle, k), args.time_limit)
            counts[kind] += 1
            cpu.append(seconds)
            if seconds > slowest[0]:
                slowest = (seconds, f"input {k} ({name}, {label}, {len(data)} bytes)")
            if kind in ("crash", "hang", "invalid"):
                out = save / f"{kind}-{k:06d}.txt"
                out.write_bytes(data)
                first = detail.strip().splitlines()[-1] if detail.strip() else ""
                print(f"{kind}: input {k} ({name}, {label}) -> {out}: {first}", flush=True)
            if (k + 1) % 1000 == 0:
                print(f"... {k + 1} inputs, {time.perf_counter() - t0:.0f} s, {counts}",
                      file=sys.stderr, flush=True)
    finally:
        runner.close()
    cpu_arr = np.array(cpu) if cpu else np.zeros(1)
    print(f"inputs: {args.n} (seed {args.seed}, {len(corpus)} demo files)")
    print(f"parsed: {counts['parsed']}  named errors: {counts['error']}  crashes: "
          f"{counts['crash']}  hangs (> {args.time_limit:g} s): {counts['hang']}  invalid "
          f"parses: {counts['invalid']}")
    print(f"CPU per input: median {1e3 * np.median(cpu_arr):.1f} ms, 99.9th percentile "
          f"{1e3 * np.quantile(cpu_arr, 0.999):.0f} ms, max {1e3 * cpu_arr.max():.0f} ms; "
          f"wall time {time.perf_counter() - t0:.0f} s")
    print(f"slowest: {slowest[1]}")
    bad = counts["crash"] + counts["hang"] + counts["invalid"]
    if bad:
        print(f"failing inputs saved in {save}")
    return 1 if bad else 0


if __name__ == "__main__":
    raise SystemExit(main())
