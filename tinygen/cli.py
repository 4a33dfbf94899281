"""Command line: verbs and flags only; the work is done by the library.

Exit codes: 0 success, 1 a check found a difference, 2 bad input or a limit exceeded (one
line on stderr naming file, node, op and reason). Results go to stdout, diagnostics to
stderr. With --json stdout gets exactly one JSON object, an error's too (docs/cli.md).
"""
from __future__ import annotations

import argparse
import json
import os
import re
import signal
import sys
import warnings

from tinygen import __version__
from tinygen.errors import Interrupted, TinygenError, escape_controls, safe_line
from tinygen.progress import for_cli
from tinygen.user_input import check_sample_volume, sample_count

# The cores `emulate` and `report --cpu` run on (tinygen/harness/target.py BOARDS).
TARGET_CPUS = ["cortex-m0", "cortex-m0plus", "cortex-m3", "cortex-m4", "cortex-m7",
               "cortex-m33", "cortex-m55", "rv32imc", "rv32imac"]

SIZE_RE = re.compile(r"^(0x[0-9a-fA-F]+|\d+)([kKmM]?)$")


def parse_size(text: str) -> int:
    """262144, 256K, 1M, 0x40000 -> bytes."""
    m = SIZE_RE.match(text.strip())
    if not m:
        raise argparse.ArgumentTypeError(f"'{text}' is not a size (262144, 256K, 1M, 0x40000)")
    n = int(m.group(1), 0)
    return n * {"": 1, "k": 1024, "m": 1024 * 1024}[m.group(2).lower()]


def parse_region(text: str) -> tuple[str, int]:
    """NAME=SIZE; the name keeps its spelling (compiler.check_regions says what it may be)."""
    name, sep, size = text.partition("=")
    if not sep:
        raise argparse.ArgumentTypeError(f"--region '{text}' is not NAME=SIZE")
    from tinygen.compiler import region_name_problem
    problem = region_name_problem(name)
    if problem:
        raise argparse.ArgumentTypeError(f"--region '{text}': {problem}")
    try:
        return name, parse_size(size)
    except argparse.ArgumentTypeError as exc:
        raise argparse.ArgumentTypeError(f"--region '{text}': {exc}") from None


class _Parser(argparse.ArgumentParser):
    def error(self, message: str):  # one line, exit 2, no usage dump
        raise TinygenError(f"{self.prog}: {message}")


def add_build_flags(p: argparse.ArgumentParser) -> None:
    from tinygen.plan import PLANNERS
    g = p.add_argument_group("build flags")
    g.add_argument("--requant", choices=["fixed", "float"], default="fixed",
                   help="fixed: Q31 multiplier + shift, no FPU (default); float: float32 scale")
    g.add_argument("--prefix", default="model", help="C name prefix and file name (model)")
    g.add_argument("--input-shape", action="append", default=[], metavar="NAME=1x3x96x96",
                   help="pin a symbolic input shape (repeatable)")
    g.add_argument("--planner", choices=list(PLANNERS), default="auto")
    g.add_argument("--order", choices=["given", "min-peak"], default="given")
    g.add_argument("--align", type=int, default=8, metavar="BYTES")
    g.add_argument("--arena-limit", type=parse_size, metavar="SIZE")
    g.add_argument("--flash-limit", type=parse_size, metavar="SIZE")
    g.add_argument("--no-inplace", action="store_true", help="never overwrite an input in place")
    g.add_argument("--region", action="append", type=parse_region, default=[],
                   metavar="NAME=SIZE", help="memory region, first = arena (repeatable)")
    g.add_argument("--io", choices=["arena", "external"], default="arena")
    g.add_argument("--kernels", choices=["auto", "portable"], default="auto",
                   help="auto: each core's fastest kernels; portable: plain C on every core")
    g.add_argument("--tables", choices=["onnx", "onnxruntime"], default="onnx",
                   help="Sigmoid/Tanh/Softmax as the ONNX definition (default) or as "
                        "onnxruntime approximates them")
    g.add_argument("--stream", choices=["auto", "off"], default="auto",
                   help="auto: compute runs of high-resolution layers a band of rows at a "
                        "time where that lowers the arena (default); off: whole tensors")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")


def build_options(args):
    from tinygen.codegen.cfmt import check_prefix
    from tinygen.compiler import BuildOptions
    try:
        check_prefix(args.prefix)
    except ValueError as exc:
        raise TinygenError(str(exc)) from None
    return BuildOptions(requant=args.requant, prefix=args.prefix,
                        input_shapes=args.input_shape, planner=args.planner, order=args.order,
                        align=args.align, arena_limit=args.arena_limit,
                        flash_limit=args.flash_limit, inplace=not args.no_inplace,
                        regions=args.region, io=args.io, kernels=args.kernels,
                        tables=args.tables, stream=args.stream)


def flags_text(args) -> str:
    """The build flags as the emitted files state them (one text for CLI and API)."""
    from tinygen.compiler import options_text
    return options_text(build_options(args))


def make_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="tinygen", description="Quantized ONNX to static-memory C99 for "
                "bare-metal microcontrollers.")
    p.add_argument("--version", action="version", version=f"tinygen {__version__}")
    sub = p.add_subparsers(dest="verb", required=True, parser_class=_Parser)
    e = sub.add_parser("emit", help="write the C tree (model.c/model.h + kernels)")
    e.add_argument("model")
    e.add_argument("-o", "--output", required=True, metavar="OUTDIR")
    into = e.add_mutually_exclusive_group()
    into.add_argument("--force", action="store_true", help="replace an existing OUTDIR")
    into.add_argument("--add", action="store_true",
                      help="add this model to the models already in OUTDIR (one firmware, "
                           "one set of kernels)")
    add_build_flags(e)
    c = sub.add_parser("check", help="compile on the host, compare with the reference")
    c.add_argument("model")
    src = c.add_mutually_exclusive_group()
    src.add_argument("--inputs", metavar="FILE.npz")
    src.add_argument("--samples", type=sample_count, default=100, metavar="N")
    c.add_argument("--against-onnxruntime", action="store_true")
    c.add_argument("--sanitize", action="store_true",
                   help="build with AddressSanitizer and UBSan")
    c.add_argument("--trace", action="store_true",
                   help="compare every op's output and name the first op that differs")
    c.add_argument("--float-model", metavar="FILE.onnx",
                   help="the model before quantization: per-layer SQNR and float accuracy")
    add_build_flags(c)
    pl = sub.add_parser("plan", help="show the arena plan")
    pl.add_argument("model")
    pl.add_argument("--svg", metavar="FILE")
    add_build_flags(pl)
    em = sub.add_parser("emulate", help="build for Cortex-M or RISC-V and run under QEMU")
    em.add_argument("model")
    em.add_argument("--cpu", required=True, choices=TARGET_CPUS)
    em.add_argument("--inputs", metavar="FILE.npz")
    em.add_argument("--samples", type=sample_count, default=4, metavar="N")
    em.add_argument("--trace", action="store_true",
                    help="compare every op's output on the core and name the first that differs")
    add_build_flags(em)
    r = sub.add_parser("report", help="write an HTML report of memory and compute")
    r.add_argument("model")
    r.add_argument("-o", "--output", required=True, metavar="REPORT.html")
    r.add_argument("--budget-ram", type=parse_size, metavar="SIZE")
    r.add_argument("--budget-flash", type=parse_size, metavar="SIZE")
    r.add_argument("--cpu", choices=TARGET_CPUS,
                   help="add emulated instructions per layer and the stack")
    rsrc = r.add_mutually_exclusive_group()
    rsrc.add_argument("--inputs", metavar="FILE.npz",
                      help="inputs for SQNR (and accuracy, with labels)")
    rsrc.add_argument("--samples", type=sample_count, default=20, metavar="N")
    r.add_argument("--float-model", metavar="FILE.onnx",
                   help="the model before quantization: per-layer SQNR")
    add_build_flags(r)
    return p


def _say(text: str) -> None:
    """A diagnostic: stderr (control characters from model names shown escaped)."""
    print(escape_controls(text, keep="\n\t"), file=sys.stderr)


def _show(text: str) -> None:
    """A result the user reads: stdout (so `tinygen plan m.onnx | less` shows it)."""
    print(escape_controls(text, keep="\n\t"))


def _inputs_of(args) -> list[str]:
    """Every file the command line gives tinygen to read (never to be written over)."""
    return [p for p in (args.model, getattr(args, "inputs", None),
                        getattr(args, "float_model", None)) if p]


def _samples(args, c) -> list:
    """The samples to run: the --inputs file, or --samples random ones."""
    from tinygen.check import load_inputs, random_inputs
    if args.inputs:
        return load_inputs(c.graph, args.inputs)
    check_sample_volume(c.graph, args.samples, args.model)
    return random_inputs(c.graph, args.samples)


def cmd_emit(args) -> int:
    from tinygen.codegen.emit import render_tree
    from tinygen.codegen.output import target_folder, write_tree
    from tinygen.compiler import compile_model, summary
    mode = "add" if args.add else "force" if args.force else "new"
    target_folder(args.output, mode, _inputs_of(args))  # refuse before the work, not after
    c = compile_model(args.model, build_options(args))
    files = render_tree(c, flags_text(args))
    if args.add:
        from tinygen.codegen.emit import add_model_to_folder
        files = add_model_to_folder(c, files, args.output)
    names = write_tree(files, args.output, args.force, add=args.add,
                       protect=_inputs_of(args))
    info = summary(c)
    info["files"] = names
    info["models"] = sorted(n[:-2] for n in names if n.endswith(".h") and
                            f"{n[:-2]}_sources.mk" in names)
    info["const_bytes"] = c.const_bytes
    if args.json:
        print(json.dumps(info))
    else:
        _show(f"wrote {len(names)} files to {args.output}")
        _show(format_summary(info, c))
    return 0


def format_summary(info: dict, c) -> str:
    return (f"arena {info['arena_bytes']} B (lower bound {info['lower_bound_bytes']} B, "
            f"no reuse {info['naive_bytes']} B), weights {info['weights_bytes']} B, "
            f"flash constants {c.const_bytes} B, {info['macs']} MACs in {info['ops']} ops "
            f"[planner {info['planner']}, order {info['order']}]")


def cmd_check(args) -> int:
    from tinygen.check import run_check
    from tinygen.compiler import compile_model
    c = compile_model(args.model, build_options(args))
    samples = _samples(args, c)
    progress = for_cli(args, "check")
    if args.sanitize:
        from tinygen.sanitize import run_sanitized
        progress.phase("running under the sanitizers")
        res = run_sanitized(c, args.model, samples, flags_text(args), args.against_onnxruntime)
    else:
        res = run_check(c, args.model, samples, flags_text(args), args.against_onnxruntime,
                        progress.phase("C vs reference, samples", len(samples)))
    traces = []
    if args.trace:
        from tinygen.trace import trace_host
        traces = trace_host(c, samples, flags_text(args), args.model,
                            args.against_onnxruntime,
                            progress.phase("trace, samples", len(samples)))
    traced_ok = all(t.equal for t in traces if t.against == "reference")
    from tinygen.accuracy import labelled_accuracy
    from tinygen.layer_error import quantization_error_or_note
    qerr, qerr_note = quantization_error_or_note(c, args.model, samples, args.float_model,
                                                 progress.phase("SQNR, samples", len(samples)))
    acc = labelled_accuracy(c, args.model, args.inputs, samples, res.outputs, res.ort_outputs,
                            qerr)
    progress.done()
    if args.json:
        info = res.as_json()
        if args.trace:
            info["trace"] = {t.against: t.as_json() for t in traces}
        info["quantization_error"] = qerr.as_json() if qerr else None
        info["accuracy"] = acc.as_json() if acc else None
        print(json.dumps(info))
    else:
        verdict = "bit-exact" if res.bit_exact else \
            f"MISMATCH in {res.mismatched_elements} of {res.total_elements} elements"
        _show(f"{args.model}: {res.samples} samples, C vs reference: {verdict}")
        if getattr(res, "problem", None):
            _show(f"sanitizer: {res.problem}")
        if res.onnxruntime is not None:
            o = res.onnxruntime
            _show(f"vs onnxruntime: max |diff| {o['max_abs_diff']} LSB, "
                  f"{100 * o['equal_fraction']:.2f}% of elements equal")
            if o.get("note"):
                _show(f"  note: {o['note']}")
        for t in traces:
            _show("\n".join(t.lines()))
        if qerr is not None:
            _show("\n".join(qerr.lines()))
        elif qerr_note:
            _say(f"note: {qerr_note}")
        if acc is not None:
            _show("\n".join(acc.lines()))
    return 0 if res.bit_exact and traced_ok else 1


def cmd_plan(args) -> int:
    from tinygen.compiler import compile_model, summary
    from tinygen.report.plan_view import plan_svg, plan_table
    if args.svg is not None:
        from tinygen.codegen.output import file_target
        file_target(args.svg, _inputs_of(args), "--svg")  # refuse before the work
    c = compile_model(args.model, build_options(args))
    info = dict(summary(c), const_bytes=c.const_bytes)
    if args.svg is not None:
        from tinygen.codegen.output import write_file
        write_file(args.svg, plan_svg(c), protect=_inputs_of(args), what="--svg")
    if args.json:
        print(json.dumps(info))
    else:
        _show(plan_table(c))
    return 0


def cmd_emulate(args) -> int:
    from tinygen.target_check import run_emulate
    progress = for_cli(args, "emulate")
    progress.phase(f"building for {args.cpu} and running on QEMU")
    info = run_emulate(args, build_options(args), flags_text(args))
    trace = None
    if args.trace:
        progress.phase(f"trace build on {args.cpu}")
        from tinygen.compiler import compile_model
        from tinygen.trace import trace_target
        c = compile_model(args.model, build_options(args))
        data = _samples(args, c)
        trace = trace_target(c, data, args.cpu, flags_text(args))
        info["trace"] = trace.as_json()
    progress.done()
    if args.json:
        print(json.dumps(info))
    else:
        why = f"; {info['board_reason']}" if info["board_reason"] else ""
        _show(f"{args.model} on {info['cpu']} ({info['board']}{why}): "
              f"bit_exact={info['bit_exact']}, flash "
             f"{info['flash_bytes']} B, RAM {info['ram_bytes']} B, stack {info['stack_bytes']} "
             f"B, {info['instructions']} instructions for {info['macs']} MACs (all "
             f"{info['samples']} samples: {info['instructions_min']}.."
             f"{info['instructions_max']})")
        if trace is not None:
            _show("\n".join(trace.lines()))
    return 0 if info["bit_exact"] and (trace is None or trace.equal) else 1


def cmd_report(args) -> int:
    from tinygen.codegen.output import file_target
    from tinygen.compiler import compile_model, summary
    from tinygen.report.html import measure_layers, write_report
    file_target(args.output, _inputs_of(args), "report")  # refuse before the work
    c = compile_model(args.model, build_options(args))
    samples = _samples(args, c)
    progress = for_cli(args, "report").phase("measuring (emulation, SQNR, accuracy)")
    layers = measure_layers(c, args.model, flags_text(args), samples, args.cpu,
                            args.float_model, args.inputs)
    progress.done()
    write_report(c, args.output, args.budget_ram, args.budget_flash, flags_text(args), layers,
                 protect=_inputs_of(args))
    if args.json:
        print(json.dumps(dict(summary(c), report=args.output, const_bytes=c.const_bytes)))
    else:
        _show(f"wrote {args.output}")
    return 0


VERBS = {"emit": cmd_emit, "check": cmd_check, "plan": cmd_plan, "emulate": cmd_emulate,
         "report": cmd_report}


SIGNAL_NAMES = {signal.SIGINT: "SIGINT", signal.SIGTERM: "SIGTERM"}


def _fail(kind: str, text: str, as_json: bool, code: int = 2, **fields) -> int:
    """An error: `tinygen: <kind>: <text>` on stderr, one line whatever it holds; with
    --json also one object on stdout, {"error": text, "exit_code": code, ...}."""
    text = safe_line(text)
    print(f"tinygen: {kind}: {text}" if text else f"tinygen: {kind}", file=sys.stderr)
    if as_json:
        print(json.dumps({"error": text or kind, "exit_code": code, **fields}))
    return code


def main(argv: list[str] | None = None) -> int:
    """The command line; argv None: this process is tinygen (the console script), which
    from here on turns SIGINT/SIGTERM into one line and exit 130/143."""
    from tinygen.codegen.output import interrupts_raise, stop_interrupts
    process = argv is None
    argv = sys.argv[1:] if argv is None else list(argv)
    as_json = "--json" in (argv[:argv.index("--")] if "--" in argv else argv)
    try:
        with interrupts_raise(), warnings.catch_warnings():
            # numpy and onnx warnings would add lines before the one line of a result
            warnings.simplefilter("ignore")
            return _run(argv, as_json)
    except KeyboardInterrupt as exc:
        signum = exc.signum if isinstance(exc, Interrupted) else signal.SIGINT
        return _fail(f"interrupted ({SIGNAL_NAMES.get(signum, signum)})", "", as_json,
                     128 + signum)
    finally:
        if process:  # the exit code is decided: a late signal must not print a traceback
            stop_interrupts()


def _run(argv: list[str], as_json: bool) -> int:
    try:
        args = make_parser().parse_args(argv)
        return VERBS[args.verb](args)
    except TinygenError as exc:
        return _fail("error", exc.one_line(), as_json, reason=safe_line(exc.reason),
                     file=safe_line(exc.file), node=safe_line(exc.node), op=safe_line(exc.op))
    except RecursionError:
        return _fail("error", "the model nests too deeply to read", as_json)
    except MemoryError:
        return _fail("error", "out of memory (the model or the inputs are too large for this "
                     "machine)", as_json)
    except Exception as exc:  # a bug in tinygen: still one line, still no output written
        if os.environ.get("TINYGEN_TRACEBACK"):
            raise
        text = " ".join(f"{type(exc).__name__}: {exc}".split())[:300]
        return _fail("internal error", f"{text} (please report it; set TINYGEN_TRACEBACK=1 "
                     "for the traceback)", as_json, internal=True)


if __name__ == "__main__":
    raise SystemExit(main())
