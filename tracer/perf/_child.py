"""Runs one benchmark in a child process of ``tracer bench`` and writes its outcome as JSON.

    python -m tracer.perf._child TARGET OUT.json [--quick]

TARGET is a benchmark file (``.../bench_model.py``) or a module name
(``tracer.perf.analysis_latency``); either must expose ``run(quick=False) -> dict``.
OUT.json receives ``{"result": dict|null, "error": str|null, "traceback": str|null,
"seconds": float}``; the exit status is 0 whenever OUT.json was written. Whatever the
benchmark prints goes to this process's stdout/stderr (the parent keeps it as a log).
"""
from __future__ import annotations

import importlib
import importlib.util
import json
import math
import sys
import time
import traceback
from pathlib import Path
from typing import Any


def jsonable(value: Any, _depth: int = 0) -> Any:
    """A JSON-safe copy: numpy scalars and arrays to Python, NaN/inf to None."""
    if _depth > 20:
        return repr(value)
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): jsonable(v, _depth + 1) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        return [jsonable(v, _depth + 1) for v in value]
    item = getattr(value, "item", None)        # numpy scalar
    if callable(item) and getattr(value, "shape", None) == ():
        return jsonable(item(), _depth + 1)
    tolist = getattr(value, "tolist", None)    # numpy array
    if callable(tolist):
        return jsonable(tolist(), _depth + 1)
    return repr(value)


def load(target: str):
    """Import a benchmark file or module; a file's folder and its checkout go on sys.path."""
    path = Path(target)
    if target.endswith(".py"):
        path = path.resolve()
        for extra in (path.parent, path.parents[2] if len(path.parents) > 2 else None):
            if extra is not None and str(extra) not in sys.path:
                sys.path.insert(0, str(extra))
        spec = importlib.util.spec_from_file_location(path.stem, path)
        if spec is None or spec.loader is None:
            raise ImportError(f"cannot load {path}")
        module = importlib.util.module_from_spec(spec)
        sys.modules[path.stem] = module
        spec.loader.exec_module(module)
        return module
    return importlib.import_module(target)


def main(argv: list[str] | None = None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    quick = "--quick" in args
    positional = [a for a in args if not a.startswith("--")]
    if len(positional) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    target, out = positional
    started = time.perf_counter()
    payload: dict[str, Any] = {"result": None, "error": None, "traceback": None}
    try:
        module = load(target)
        run = getattr(module, "run", None)
        if not callable(run):
            raise TypeError(f"{target} has no run(quick=...) function")
        result = run(quick=quick)
        if not isinstance(result, dict):
            raise TypeError(f"{target}: run() returned {type(result).__name__}, not a dict")
        payload["result"] = jsonable(result)
    except BaseException as exc:  # noqa: BLE001 - every failure is reported, none kills the report
        payload["error"] = f"{type(exc).__name__}: {exc}".strip()
        payload["traceback"] = traceback.format_exc()
    payload["seconds"] = time.perf_counter() - started
    sys.stdout.flush()
    Path(out).write_text(json.dumps(payload, allow_nan=False), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
