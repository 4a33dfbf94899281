"""`python -m tinygen.bench` (`make bench`): memory and speed tables for the example models.

For every examples/*/*.onnx (float exports `*_float.onnx` left out) it writes markdown to
bench/results.md and prints it:
  - arena bytes for each planner x order, with and without in-place execution, beside the
    lower bound and the no-reuse size (all re-planned from one compile);
  - weights, all flash constants of the emitted C, MACs;
  - host speed: the emitted C (built -O2, called through cffi) against onnxruntime on the
    same machine in the same run, as per-inference times and their ratio (noisy: a shared
    machine, timer resolution; best of several batches);
  - with valgrind installed: instructions of one inference of the host build, counted by
    callgrind on a small C driver (deterministic for a given compiler).
A model the compiler does not take yet gets a one-line note instead of figures.
"""
from __future__ import annotations

import argparse
import platform
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from tinygen.check import c_inputs
from tinygen.compiler import BuildOptions, Compiled, compile_model, storage_inputs
from tinygen.errors import TinygenError
from tinygen.report.plan_view import ORDERS, PlannerRow, compare_planners

ROOT = Path(__file__).resolve().parent.parent
BATCH_SECONDS = 0.05  # one timed batch; the best of BATCHES is kept
BATCHES = 5


@dataclass
class Speed:
    c_run_us: float  # <prefix>_run alone, input already in the arena
    session_us: float  # Session.run: quantize, run, dequantize, numpy glue
    onnxruntime_us: float  # InferenceSession.run, one thread
    instructions: int | None  # callgrind, one inference; None without valgrind


@dataclass
class ModelBench:
    name: str
    path: Path
    error: str = ""
    compiled: Compiled | None = None
    planners: list[PlannerRow] = field(default_factory=list)
    flash_bytes: int = 0
    speed: Speed | None = None
    speed_note: str = ""


def example_models(root: Path = ROOT) -> list[Path]:
    """The quantized example models, float exports left out."""
    return sorted(p for p in (root / "examples").glob("*/*.onnx")
                  if not p.name.endswith("_float.onnx"))


def bench_memory(path: Path) -> ModelBench:
    """Compile once, re-plan with every planner and order, render the C for flash bytes."""
    from tinygen.codegen.emit import render_tree
    mb = ModelBench(path.stem, path)
    try:
        mb.compiled = compile_model(str(path), BuildOptions())
        render_tree(mb.compiled, "bench")  # sets const_bytes
    except TinygenError as exc:
        mb.error = exc.one_line()
        return mb
    except Exception as exc:  # a compiler gap is a finding for the table, not a crash
        mb.error = f"{type(exc).__name__}: {exc}"
        return mb
    mb.planners = compare_planners(mb.compiled)
    mb.flash_bytes = mb.compiled.const_bytes
    return mb


# -- timing -------------------------------------------------------------------------------

def per_call_seconds(fn) -> float:
    """Best per-call time over BATCHES batches of about BATCH_SECONDS each."""
    n = 1
    while True:
        t0 = time.perf_counter()
        for _ in range(n):
            fn()
        dt = time.perf_counter() - t0
        if dt >= BATCH_SECONDS / 4:
            break
        n *= 4
    n = max(1, int(n * BATCH_SECONDS / dt))
    best = float("inf")
    for _ in range(BATCHES):
        t0 = time.perf_counter()
        for _ in range(n):
            fn()
        best = min(best, (time.perf_counter() - t0) / n)
    return best


def sample_feeds(mb: ModelBench) -> dict[str, np.ndarray]:
    """The model's own sample input when there is one, else seeded random data."""
    g = mb.compiled.graph
    npz = mb.path.parent / "sample_inputs.npz"
    if len(g.inputs) == 1 and npz.exists():
        x = np.load(npz)["inputs"][0].astype(np.float32)
        return {g.inputs[0].onnx_name: x}
    rng = np.random.default_rng(0)
    feeds = {}
    for io in g.inputs:
        shape = g.tensors[io.name].shape
        if io.onnx_dtype == "float32":
            feeds[io.onnx_name] = rng.normal(0, 1, shape).astype(np.float32)
        else:
            info = np.iinfo(io.onnx_dtype)
            feeds[io.onnx_name] = rng.integers(info.min, info.max + 1, shape).astype(
                io.onnx_dtype)
    return feeds


def bench_speed(mb: ModelBench, work: Path) -> None:
    """Fill mb.speed (or mb.speed_note when something needed is missing)."""
    try:
        import onnxruntime as ort
    except ImportError:
        mb.speed_note = "onnxruntime not installed"
        return
    from tinygen.harness.session import Session
    try:
        sess = Session(str(mb.path), BuildOptions(), work_dir=str(work / "session"))
    except TinygenError as exc:
        mb.speed_note = exc.one_line()
        return
    feeds = sample_feeds(mb)
    so = ort.SessionOptions()
    so.intra_op_num_threads = 1  # the C runs on one core; so does onnxruntime here
    so.inter_op_num_threads = 1
    ref = ort.InferenceSession(str(mb.path), so, providers=["CPUExecutionProvider"])
    p = sess.options.prefix
    run_c, in_ptr = getattr(sess.lib, f"{p}_run"), getattr(sess.lib, f"{p}_input")
    ffi, nul = sess.ffi, sess.ffi.NULL
    owner = ffi.new("uint8_t[]", mb.compiled.plan.arena_bytes + 64)  # keeps the memory alive
    arena = owner + (-int(ffi.cast("uintptr_t", owner))) % 64
    g = mb.compiled.graph
    raw = [x.tobytes() for x in c_inputs(g, storage_inputs(g, [feeds[io.onnx_name]
                                                               for io in g.inputs]))]
    dst = [in_ptr(arena, i) for i in range(len(raw))]

    def one_c_inference():  # the run overwrites its input buffers: refill them every time
        for d, r in zip(dst, raw, strict=True):
            ffi.memmove(d, r, len(r))
        run_c(arena, nul, nul)

    t_c = per_call_seconds(one_c_inference)
    t_session = per_call_seconds(lambda: sess.run(feeds))
    t_ort = per_call_seconds(lambda: ref.run(None, feeds))
    mb.speed = Speed(t_c * 1e6, t_session * 1e6, t_ort * 1e6,
                     callgrind_instructions(sess.tree, p, len(mb.compiled.graph.inputs),
                                            len(mb.compiled.graph.outputs), work))


# -- instruction count --------------------------------------------------------------------

def driver_source(prefix: str, n_inputs: int, n_outputs: int) -> str:
    """A C main that runs one inference on a fixed byte pattern and prints a checksum."""
    g = prefix.upper()
    lines = ["/* One inference on a fixed input, for instruction counting. */",
             "#include <stdint.h>", "#include <stdio.h>", f'#include "{prefix}.h"', "",
             "int main(void)", "{", "    uint32_t i, sum = 0u;", "    uint8_t *in;",
             "    const uint8_t *out;"]
    for k in range(n_inputs):
        lines += [f"    in = (uint8_t *){prefix}_input(NULL, {k});",
                  f"    for (i = 0u; i < {g}_INPUT_{k}_BYTES; ++i) {{",
                  "        in[i] = (uint8_t)(i * 37u + 11u);", "    }"]
    lines += [f"    if ({prefix}_run(NULL, NULL, NULL) != 0) {{", "        return 1;", "    }"]
    for k in range(n_outputs):
        lines += [f"    out = (const uint8_t *){prefix}_output(NULL, {k});",
                  f"    for (i = 0u; i < {g}_OUTPUT_{k}_BYTES; ++i) {{",
                  "        sum += out[i];", "    }"]
    lines += ['    printf("%lu\\n", (unsigned long)sum);', "    return 0;", "}", ""]
    return "\n".join(lines)


def callgrind_instructions(tree: Path, prefix: str, n_inputs: int, n_outputs: int,
                           work: Path) -> int | None:
    """Instructions executed inside <prefix>_run for one inference, or None without valgrind."""
    from tinygen.harness.cbuild import STRICT_FLAGS, host_compiler
    if shutil.which("valgrind") is None:
        return None
    work.mkdir(parents=True, exist_ok=True)
    drv = work / "driver.c"
    drv.write_text(driver_source(prefix, n_inputs, n_outputs))
    exe = work / "driver"
    cmd = [host_compiler(), "-O2", *STRICT_FLAGS, f"-I{tree}", *map(str, sorted(tree.glob(
        "*.c"))), str(drv), "-o", str(exe), "-lm"]
    subprocess.run(cmd, check=True, capture_output=True)
    out = work / "callgrind.out"
    subprocess.run(["valgrind", "--tool=callgrind", f"--callgrind-out-file={out}",
                    f"--toggle-collect={prefix}_run", str(exe)], check=True,
                   capture_output=True)
    for line in out.read_text().splitlines():
        if line.startswith("summary:"):
            return int(line.split()[1])
    return None


# -- tables -------------------------------------------------------------------------------

def _md(header: list[str], rows: list[list], right_from: int = 1) -> str:
    sep = ["---" if i < right_from else "--:" for i in range(len(header))]
    lines = ["| " + " | ".join(header) + " |", "| " + " | ".join(sep) + " |"]
    lines += ["| " + " | ".join("-" if v is None else str(v) for v in r) + " |" for r in rows]
    return "\n".join(lines)


def _by(rows: list[PlannerRow], planner: str, order: str) -> PlannerRow:
    return next(r for r in rows if r.planner == planner and r.order == order)


def memory_table(results: list[ModelBench]) -> str:
    """Arena bytes per planner x order (and without in-place), lower bound, no reuse."""
    header = ["model", "planner", *[f"{o}" for o in ORDERS],
              *[f"{o}, no in-place" for o in ORDERS]]
    rows = []
    for mb in results:
        if mb.error:
            continue
        planners = list(dict.fromkeys(r.planner for r in mb.planners))
        for p in planners:
            cells = [_by(mb.planners, p, o) for o in ORDERS]
            rows.append([mb.name, p, *[r.arena for r in cells],
                         *[r.arena_no_inplace for r in cells]])
        first = [_by(mb.planners, planners[0], o) for o in ORDERS]
        rows.append([mb.name, "*lower bound*", *[r.lower_bound for r in first],
                     *[r.lower_bound_no_inplace for r in first]])
    return _md(header, rows, right_from=2)


def figures_table(results: list[ModelBench]) -> str:
    rows = []
    for mb in results:
        if mb.error:
            continue
        c = mb.compiled
        rows.append([mb.name, sum(1 for op in c.graph.ops if op.kind != "view"), c.macs,
                     c.weights_bytes, mb.flash_bytes, c.plan.naive])
    return _md(["model", "kernel calls", "MACs", "weights B", "flash constants B",
                "no reuse B"], rows)


def speed_table(results: list[ModelBench]) -> str:
    rows = []
    for mb in results:
        s = mb.speed
        if s is None:
            continue
        ipm = f"{s.instructions / mb.compiled.macs:.1f}" if s.instructions and \
            mb.compiled.macs else None
        rows.append([mb.name, f"{s.c_run_us:.1f}", f"{s.session_us:.1f}",
                     f"{s.onnxruntime_us:.1f}", f"{s.c_run_us / s.onnxruntime_us:.2f}",
                     f"{s.session_us / s.onnxruntime_us:.2f}", s.instructions, ipm])
    return _md(["model", "C run us", "Session.run us", "onnxruntime us", "C / onnxruntime",
                "Session / onnxruntime", "instructions (callgrind)", "instructions / MAC"],
               rows)


def machine_line() -> str:
    from tinygen.harness.cbuild import host_compiler
    try:
        import onnxruntime
        ort = onnxruntime.__version__
    except ImportError:
        ort = "not installed"
    cc = host_compiler()
    ver = subprocess.run([cc, "--version"], capture_output=True, text=True).stdout
    return (f"{platform.machine()} {platform.system()}, Python {platform.python_version()}, "
            f"onnxruntime {ort}, {(ver.splitlines() or [cc])[0]} -O2")


def render(results: list[ModelBench], with_speed: bool) -> str:
    out = ["# tinygen bench", "", f"Host: {machine_line()}.", "",
           "## Arena bytes by planner and order", "",
           "Default flags otherwise (--align 8, --io arena). The lower bound is the largest "
           "sum of live buffers at one step for that order.", "", memory_table(results), "",
           "## Model figures", "", figures_table(results), ""]
    if with_speed:
        out += ["## Host speed", "",
                "Per-inference times measured in this one run on this machine (best of "
                f"{BATCHES} batches of about {BATCH_SECONDS * 1000:.0f} ms; noisy, compare "
                "the ratios, not the absolute times). C run: the emitted <prefix>_run (-O2, "
                "called through cffi, its input bytes refilled before each call); Session.run "
                "adds quantize/dequantize and the numpy glue; onnxruntime: "
                "InferenceSession.run on one thread, same float input. Ratio < 1: "
                "the C is faster. Instructions: callgrind, inside <prefix>_run, one "
                "inference (exact for this compiler).", "", speed_table(results), ""]
        notes = [f"- {mb.name}: speed not measured ({mb.speed_note})"
                 for mb in results if not mb.error and mb.speed is None and mb.speed_note]
        out += notes + ([""] if notes else [])
    skipped = [f"- {mb.name}: not compiled: {mb.error}" for mb in results if mb.error]
    if skipped:
        out += ["## Not benchmarked", "", *skipped, ""]
    return "\n".join(out)


def run_bench(models: list[Path], with_speed: bool = True) -> str:
    """Benchmark `models` and return the markdown."""
    results = []
    with tempfile.TemporaryDirectory(prefix="tinygen-bench-") as tmp:
        for i, path in enumerate(models):
            mb = bench_memory(path)
            if with_speed and not mb.error:
                bench_speed(mb, Path(tmp) / str(i))
            results.append(mb)
    return render(results, with_speed)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tinygen.bench", description=__doc__.split(
        "\n")[0])
    ap.add_argument("models", nargs="*", help="ONNX files (default: the example models)")
    ap.add_argument("--out", default=str(ROOT / "bench" / "results.md"),
                    help="markdown output (default bench/results.md)")
    ap.add_argument("--no-speed", action="store_true", help="memory tables only")
    ap.add_argument("--scale", action="store_true",
                    help="plan and emit time of 1k/10k/100k-op chains (bench/scale.md)")
    args = ap.parse_args(argv)
    if args.scale:
        from tinygen.bench_scale import write_scale_table
        print(write_scale_table(ROOT / "bench" / "scale.md"))
        return 0
    models = [Path(m) for m in args.models] or example_models()
    text = run_bench(models, with_speed=not args.no_speed)
    out = Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(text)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
