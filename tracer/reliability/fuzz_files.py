"""Hostile files through the command line: protocols, bench profiles and CSV curves.

Each case is a file built by hypothesis from a valid one (text mutations: truncation,
flipped and inserted bytes, dropped or repeated lines, hostile YAML scalars and tags,
alias bombs, deep nesting, oversize files, non-UTF-8 bytes; or structural ones: any value
of any key replaced by any YAML value), fed to the real ``tracer`` command in this
process (``tracer.cli.main.main``), and judged:

- the command returns (no exception escapes ``main``) with the documented status: 0 for a
  file that is in fact valid, 2 for one that is not (1 "internal error" is a failure);
- nothing on stdout or stderr looks like a traceback; a refusal says something on stderr,
  in lines of bounded length, and (protocols, bench profiles) names the file;
- nothing is half-written: a refused ``tracer run`` creates no logbook and no export
  folder; a refused ``tracer correct --out FILE`` leaves no FILE (and an accepted one
  leaves a complete, readable FILE).

:func:`fuzz` runs ``count`` cases of one kind and returns a :class:`FuzzSummary`; hypothesis
shrinks the first failure to a small example, which the summary keeps. Hypothesis is a
test-time dependency: without it these checks cannot run and say so.
"""
from __future__ import annotations

import contextlib
import io
import math
import shutil
import tempfile
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

import yaml

from . import protocols

KINDS = ("protocol", "bench", "csv")
LONGEST_LINE = 2000          # characters; a message line longer than this is not "clear"

HOSTILE_SCALARS = (
    "", "~", "null", "nan", ".nan", ".inf", "-.inf", "1e999", "1.0e309", "-1", "0", "-0.0",
    "1e-400", "true", "yes", "on", "off", "[]", "{}", "[1, [2, [3]]]", "{a: {b: {c: 1}}}",
    "!!python/object/apply:os.system ['true']", "!!python/name:os.system", "!!binary aGVsbG8=",
    "!!set {a, b}", "!!timestamp 2024-01-01", "!!timestamp 2024-01-01x", "!!bool maybe",
    "!!int 0x", "!!float one", "!!null x", "!!str", "&anchor 1", "*undefined_alias", "'unterminated",
    '"\\x00\\uffff"', "'''", "0x10", "0o17", "1_000", "2024-01-01", "12:30:00", "<<: *nothing",
    "TCPIP0::10.0.0.7::5025::SOCKET", "GPIB0::22::INSTR", "ASRL/dev/ttyUSB0::INSTR",
    "../../../etc/passwd", "%(x)s", "{0.__class__}", "\t", "é", "\U0001F600", "x" * 5000,
    "9" * 400, "-" * 3, "? complex key", "- list item", "|", ">-",
)

BILLION_LAUGHS = "\n".join(
    ["a0: &a0 [lol, lol, lol, lol, lol, lol, lol, lol, lol]"]
    + [f"a{k}: &a{k} [" + ", ".join([f"*a{k - 1}"] * 9) + "]" for k in range(1, 9)]
    + ["schema: *a8"]) + "\n"


@dataclass
class FuzzSummary:
    kind: str
    cases: int = 0
    failures: int = 0
    elapsed_s: float = 0.0
    example: str = ""                 # the (shrunk) failing case, shortened
    problems: list[str] = field(default_factory=list)
    skipped: str = ""                 # why nothing ran (hypothesis missing)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def summary(self) -> str:
        if self.skipped:
            return f"{self.kind:<9} skipped: {self.skipped}"
        head = (f"{self.kind:<9} {self.cases} cases, {self.failures} failure(s), "
                f"{self.elapsed_s:.1f} s")
        if self.failures:
            head += f"\n    example: {self.example}\n    " + "\n    ".join(self.problems)
        return head


# ----------------------------------------------------------------------------- the command
@dataclass
class CliOutcome:
    code: int | None
    out: str
    err: str
    escaped: str = ""        # an exception that escaped main()


def run_cli(argv: list[str]) -> CliOutcome:
    """``tracer ARGV`` in this process, with its output captured."""
    from tracer.cli.main import main

    out, err = io.StringIO(), io.StringIO()
    escaped = ""
    code: int | None
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:          # argparse refusals
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 2)
        except KeyboardInterrupt:
            raise
        except BaseException as exc:  # noqa: BLE001 - exactly what this check looks for
            code = None
            escaped = f"{type(exc).__name__}: {exc}"
    return CliOutcome(code, out.getvalue(), err.getvalue(), escaped)


def judge_refusal(outcome: CliOutcome, *, allowed: tuple[int, ...], file_name: str | None
                  ) -> list[str]:
    """Problems with how the command met a (possibly) hostile file."""
    problems = []
    if outcome.escaped:
        problems.append(f"an exception escaped the command: {outcome.escaped[:300]}")
    elif outcome.code not in allowed:
        problems.append(f"exit status {outcome.code}, documented {allowed}: "
                        f"{outcome.err.strip()[:300]}")
    for name, text in (("stdout", outcome.out), ("stderr", outcome.err)):
        if "Traceback (most recent call last)" in text:
            problems.append(f"a traceback on {name}")
    if outcome.code == 2:
        if not outcome.err.strip():
            problems.append("refused without a word on stderr")
        long = [line for line in outcome.err.splitlines() if len(line) > LONGEST_LINE]
        if long:
            problems.append(f"a message line of {len(long[0])} characters")
        names = (file_name,) if isinstance(file_name, str) else file_name
        if names and not any(n in outcome.err for n in names):
            problems.append(f"the refusal does not name the file {' or '.join(names)}: "
                            f"{outcome.err.strip()[:200]}")
    return problems


# ----------------------------------------------------------------------------- mutations
def _text_mutations(st: Any) -> Any:
    """A strategy of functions bytes -> bytes."""
    def at(fraction: float, data: bytes) -> int:
        return int(fraction * len(data)) if data else 0

    def lines(data: bytes) -> list[bytes]:
        return data.split(b"\n")

    unit = st.floats(0.0, 1.0, allow_nan=False)
    hostile = st.sampled_from(HOSTILE_SCALARS).map(lambda s: s.encode("utf-8", "surrogatepass"))
    any_bytes = st.binary(min_size=1, max_size=16)

    def truncate(f):
        return lambda d: d[:at(f, d)]

    def flip(f, b):
        return lambda d: d[:at(f, d)] + b + d[at(f, d) + 1:] if d else b

    def insert(f, b):
        return lambda d: d[:at(f, d)] + b + d[at(f, d):]

    def drop_line(f):
        return lambda d: b"\n".join(l for k, l in enumerate(lines(d)) if k != at(f, lines(d)))

    def repeat_line(f):
        def op(d):
            ls = lines(d)
            k = min(at(f, ls), len(ls) - 1)
            return b"\n".join(ls[:k + 1] + ls[k:])
        return op

    def replace_value(f, value):
        def op(d):
            ls = lines(d)
            candidates = [k for k, l in enumerate(ls) if b":" in l and not l.lstrip().startswith(b"#")]
            if not candidates:
                return d
            k = candidates[min(at(f, candidates), len(candidates) - 1)]
            key, _, _ = ls[k].partition(b":")
            ls[k] = key + b": " + value
            return b"\n".join(ls)
        return op

    def insert_key(f, key, value):
        def op(d):
            ls = lines(d)
            k = min(at(f, ls), len(ls))
            indent = b""
            if k < len(ls):
                indent = ls[k][:len(ls[k]) - len(ls[k].lstrip())]
            return b"\n".join(ls[:k] + [indent + key + b": " + value] + ls[k:])
        return op

    keys = st.sampled_from([b"address", b"instruments", b"resource", b"nplcs", b"<<", b"steps",
                            b"limits", b"kind", b"voltage_v", b"\xff\xfe", b"'quoted key'"])
    return st.one_of(
        st.builds(truncate, unit),
        st.builds(flip, unit, any_bytes),
        st.builds(insert, unit, any_bytes),
        st.builds(insert, unit, hostile),
        st.builds(drop_line, unit),
        st.builds(repeat_line, unit),
        st.builds(replace_value, unit, hostile),
        st.builds(insert_key, unit, keys, hostile),
    )


def _whole_file_cases(st: Any) -> Any:
    return st.sampled_from([
        b"", b"\n", b"   \n\t\n", b"---\n...\n", b"- just\n- a list\n", b"just a string\n",
        b"\x00\x01\x02binary\xff\xfe", b"\xef\xbb\xbf", b"\xff\xfe" + "schema: 1\n".encode("utf-16-le"),
        BILLION_LAUGHS.encode(), b"[" * 5000 + b"]" * 5000, b"{a: " * 3000 + b"1" + b"}" * 3000,
        b"# " + b"x" * (1 << 20) + b"\n", b"!!python/object/apply:os.system ['true']\n",
        b"key: value\nkey: again\n", b"%YAML 9.9\n---\na: 1\n", b"a: !!binary |\n  ////\n",
    ])


def _yaml_values(st: Any) -> Any:
    leaves = st.one_of(
        st.none(), st.booleans(), st.integers(), st.integers(min_value=-(10 ** 40), max_value=10 ** 40),
        st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=40),
        st.sampled_from(["open", "closed", "forward", "both", "list", "auto", "voc", "bias",
                         "linear", "log", "dense-near-voc", "all", "current", "voltage"]))
    return st.recursive(leaves, lambda children: st.one_of(
        st.lists(children, max_size=4),
        st.dictionaries(st.text(max_size=12), children, max_size=4)), max_leaves=12)


def _paths(doc: Any, prefix: tuple = ()) -> list[tuple]:
    out = [prefix]
    if isinstance(doc, dict):
        for k, v in doc.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(doc, list):
        for k, v in enumerate(doc):
            out += _paths(v, prefix + (k,))
    return out


def _replace(doc: Any, path: tuple, value: Any) -> Any:
    if not path:
        return value
    head, rest = path[0], path[1:]
    if isinstance(doc, dict):
        new = dict(doc)
        new[head] = _replace(doc[head], rest, value)
        return new
    new_list = list(doc)
    new_list[head] = _replace(doc[head], rest, value)
    return new_list


def _structural(st: Any, docs: list[dict]) -> Any:
    """Replace one node (a leaf or a whole section) of a valid document by any value."""
    @st.composite
    def build(draw):
        doc = draw(st.sampled_from(docs))
        path = draw(st.sampled_from(_paths(doc)))
        value = draw(_yaml_values(st))
        mutated = _replace(doc, path, value)
        try:
            return yaml.safe_dump(mutated, sort_keys=False, allow_unicode=True).encode("utf-8")
        except (yaml.YAMLError, ValueError):
            return yaml.safe_dump(doc).encode("utf-8")
    return build()


def _mutated(st: Any, texts: list[bytes], docs: list[dict]) -> Any:
    text_cases = st.builds(lambda base, ops: _apply(base, ops), st.sampled_from(texts),
                           st.lists(_text_mutations(st), min_size=1, max_size=3))
    return st.one_of(text_cases, _structural(st, docs), _whole_file_cases(st))


def _apply(base: bytes, ops: list[Callable[[bytes], bytes]]) -> bytes:
    for op in ops:
        base = op(base)
    return base


# ----------------------------------------------------------------------------- the inputs
def _shipped_protocols() -> list[Path]:
    root = Path(__file__).resolve().parents[2] / "protocols"
    return sorted(root.glob("*.yaml")) if root.is_dir() else []


def protocol_bases() -> tuple[list[bytes], list[dict]]:
    docs = [protocols.matrix_protocol(), protocols.crash_protocol(), protocols.load_protocol(),
            protocols.safety_order_protocol()]
    texts = [yaml.safe_dump(d, sort_keys=False).encode() for d in docs]
    for path in _shipped_protocols():
        raw = path.read_bytes()
        texts.append(raw)
        docs.append(yaml.safe_load(raw))
    return texts, docs


def bench_document(port_base: int = 1) -> dict[str, Any]:
    """A bench profile in the documented form (docs/bench-profile.md) whose instruments sit
    on loopback ports nobody listens on."""
    def addr(k: int) -> str:
        return f"TCPIP0::127.0.0.1::{port_base + k}::SOCKET"
    return {"bench": {
        "name": "fuzz-bench",
        "instruments": {
            "smu": {"address": addr(0), "driver": "scpi-smu", "timeout_s": 1},
            "light": {"address": addr(1), "driver": "scpi-light"},
            "thermometer": {"address": addr(2), "driver": "scpi-thermometer"},
            "switch": {"address": addr(3), "driver": "scpi-switch", "channels": 6},
        },
        "hard_limits": {"voltage_v": 25.0, "current_a": 1.0, "power_w": 10.0,
                        "reverse_voltage_v": 2.0},
        "reference_cell": {"calibration_isc_a": 0.12, "calibration_uncertainty_rel": 0.01,
                           "temperature_coefficient_per_k": 0.0005},
        "instability_class": "A",
        "usual_series_resistance_ohm": 1.0,
    }}


def csv_base(points: int = 30) -> bytes:
    """A light I-V curve of a ~1 cm2 cell (generator convention) as the logbook exports it:
    ``# key: value`` header lines, then the columns. Values from the single-diode equation
    with invented demo parameters (Iph 38 mA, I0 1 pA, n 1, Rsh 1.5 kOhm, Rs 0)."""
    vt = 0.025693      # kT/q at 25 C [V] (CODATA via scipy.constants gives 0.0256926)
    lines = ["# format: \"tracer-sweep-csv/1\"", "# step_name: \"light\"",
             "voltage_v,current_a,seq,in_compliance,irradiance_w_m2,temperature_c"]
    for k in range(points):
        v = -0.1 + 0.75 * k / max(points - 1, 1)
        i = 0.038 - 1e-12 * (math.exp(v / vt) - 1.0) - v / 1500.0
        lines.append(f"{v!r},{i!r},{k + 1},0,1000.0,25.0")
    return ("\n".join(lines) + "\n").encode()


# ----------------------------------------------------------------------------- the checks
def _check_protocol(data: bytes, work: Path, bench_file: Path) -> list[str]:
    case = work / "case"
    if case.exists():
        shutil.rmtree(case)
    case.mkdir()
    path = case / "protocol.yaml"
    path.write_bytes(data)
    outcome = run_cli(["check", str(path), "--bench", str(bench_file)])
    problems = judge_refusal(outcome, allowed=(0, 2), file_name=path.name)
    if outcome.code == 2 and not problems:
        # the same file through `tracer run`: refused before anything is opened or written
        logbook = case / "logbook.sqlite"
        out_dir = case / "exports"
        run = run_cli(["run", str(path), "--bench", str(bench_file), "--logbook", str(logbook),
                       "--out", str(out_dir)])
        problems += [f"tracer run: {p}" for p in judge_refusal(run, allowed=(2,), file_name=path.name)]
        if logbook.exists() or out_dir.exists():
            problems.append("tracer run refused the protocol but wrote a logbook or exports")
    left = sorted(p.name for p in case.iterdir() if p.name != path.name)
    if left:
        problems.append(f"files left behind: {left}")
    return problems


def _check_bench(data: bytes, work: Path, protocol_file: Path) -> list[str]:
    case = work / "case"
    if case.exists():
        shutil.rmtree(case)
    case.mkdir()
    path = case / "bench.yaml"
    path.write_bytes(data)
    outcome = run_cli(["check", str(protocol_file), "--bench", str(path)])
    # a valid bench whose hard limits refuse the protocol is reported against the protocol
    problems = judge_refusal(outcome, allowed=(0, 2), file_name=(path.name, protocol_file.name))
    left = sorted(p.name for p in case.iterdir() if p.name != path.name)
    if left:
        problems.append(f"files left behind: {left}")
    return problems


def _check_csv(data: bytes, work: Path) -> list[str]:
    from tracer.fit.csvio import read_iv_csv

    case = work / "case"
    if case.exists():
        shutil.rmtree(case)
    case.mkdir()
    path = case / "curve.csv"
    path.write_bytes(data)
    problems = []
    fit = run_cli(["fit", str(path)])
    # (a curve that reads but cannot be fitted is refused without the file's name: one file
    # per command, so the message needs none)
    problems += [f"tracer fit: {p}" for p in judge_refusal(fit, allowed=(0, 2), file_name=None)]
    out = case / "translated.csv"
    correct = run_cli(["correct", str(path), "--procedure", "1", "--irradiance-w-m2", "900",
                       "--temperature-c", "30", "--alpha-a-per-k", "2e-5", "--beta-v-per-k",
                       "-0.002", "--series-resistance-ohm", "0.5", "--kappa-ohm-per-k", "0",
                       "--out", str(out)])
    problems += [f"tracer correct: {p}"
                 for p in judge_refusal(correct, allowed=(0, 2), file_name=None)]
    if correct.code == 2 and out.exists():
        problems.append("tracer correct refused the file but wrote --out")
    if correct.code == 0:
        try:
            v, i = read_iv_csv(out)
            if len(v) == 0:
                problems.append("tracer correct wrote an empty --out")
        except Exception as exc:  # noqa: BLE001
            problems.append(f"tracer correct wrote an unreadable --out: {exc}")
    left = sorted(p.name for p in case.iterdir() if p.name not in (path.name, out.name))
    if left:
        problems.append(f"files left behind: {left}")
    return problems


# ----------------------------------------------------------------------------- driver
def hypothesis_available() -> bool:
    try:
        import hypothesis  # noqa: F401
    except ImportError:
        return False
    return True


def fuzz(kind: str, count: int, *, seed: int = 0, workdir: Path | None = None) -> FuzzSummary:
    """``count`` hostile files of ``kind`` (protocol | bench | csv) through the CLI."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {KINDS}")
    summary = FuzzSummary(kind)
    if not hypothesis_available():
        summary.skipped = "hypothesis is not installed (pip install -e '.[test]')"
        return summary
    import logging

    from hypothesis import HealthCheck, given, settings
    from hypothesis import seed as fixed_seed
    from hypothesis import strategies as st

    own = workdir is None
    work = Path(tempfile.mkdtemp(prefix=f"tracer-fuzz-{kind}-")) if own else Path(workdir)
    work.mkdir(parents=True, exist_ok=True)
    bench_file = work / "valid-bench.yaml"
    bench_file.write_text(yaml.safe_dump(bench_document()), encoding="utf-8")
    protocol_file = protocols.write_protocol(protocols.load_protocol(), work / "valid-protocol.yaml")
    if kind == "protocol":
        texts, docs = protocol_bases()
        cases = _mutated(st, texts, docs)
        check = lambda data: _check_protocol(data, work, bench_file)  # noqa: E731
    elif kind == "bench":
        doc = bench_document()
        cases = _mutated(st, [yaml.safe_dump(doc, sort_keys=False).encode(),
                              bench_file.read_bytes()], [doc])
        check = lambda data: _check_bench(data, work, protocol_file)  # noqa: E731
    else:
        base = csv_base()
        numbers = st.sampled_from(["nan", "inf", "-inf", "1e309", "", " ", "1,5", "0x1p-3",
                                   "1e-320", "-0", "1e300", "NaN", "Infinity", "+", "--1",
                                   "1.2.3", "\"1\"", "1 2"])

        def replace_number(data: bytes, row: float, col: int, token: str) -> bytes:
            ls = data.decode().split("\n")
            rows = [k for k, l in enumerate(ls) if l and l[0] in "-0123456789"]
            if not rows:
                return data
            k = rows[min(int(row * len(rows)), len(rows) - 1)]
            fields = ls[k].split(",")
            fields[col % len(fields)] = token
            ls[k] = ",".join(fields)
            return "\n".join(ls).encode()

        number_cases = st.builds(replace_number, st.just(base), st.floats(0, 1), st.integers(0, 5),
                                 numbers)
        sizes = st.builds(lambda n: csv_base(n), st.integers(1, 400))
        cases = st.one_of(_mutated(st, [base], [{"voltage_v": [0.0], "current_a": [0.0]}]),
                          number_cases, sizes)
        check = lambda data: _check_csv(data, work)  # noqa: E731

    state = {"n": 0, "last": None}

    @fixed_seed(seed)
    @settings(max_examples=count, deadline=None, database=None, derandomize=False,
              suppress_health_check=list(HealthCheck), print_blob=False)
    @given(cases)
    def one(data: bytes) -> None:
        state["n"] += 1
        problems = check(data)
        if problems:
            state["last"] = (data, problems)
            raise AssertionError("; ".join(problems))

    t0 = time.monotonic()
    quiet = logging.getLogger("hypothesis")
    level = quiet.level
    quiet.setLevel(logging.ERROR)
    try:
        one()
    except AssertionError:
        summary.failures = 1
    except Exception as exc:  # noqa: BLE001 - hypothesis itself gave up: report it
        summary.failures = 1
        summary.problems = [f"the fuzzer stopped: {type(exc).__name__}: {exc}"]
    finally:
        quiet.setLevel(level)
        summary.elapsed_s = time.monotonic() - t0
        summary.cases = state["n"]
        if own:
            shutil.rmtree(work, ignore_errors=True)
    if state["last"] is not None:
        data, problems = state["last"]
        shown = data if len(data) <= 400 else data[:400] + f"... ({len(data)} bytes)".encode()
        summary.example = repr(shown)
        summary.problems = problems
    return summary


def fuzz_all(count: int, *, seed: int = 0, kinds: tuple[str, ...] = KINDS,
             progress: Any = None) -> list[FuzzSummary]:
    out = []
    for kind in kinds:
        s = fuzz(kind, count, seed=seed)
        out.append(s)
        if progress is not None:
            progress(s)
    return out
