"""Write the C tree for a compiled model: <prefix>.h/.c, the kernels it uses, build snippets.

Identifiers in the C come from the prefix and op/tensor indices only; names from the ONNX
file appear solely inside comments, escaped by `c_comment_text`. Writing the tree to disk
(safely, with its manifest) is codegen/output.py's.
"""
from __future__ import annotations

import os
from pathlib import Path

import jinja2
import numpy as np

import tinygen
from tinygen.codegen.cfmt import (
    C_TYPES,
    ParamsWriter,
    c_array,
    c_comment_text,
    c_float,
    check_prefix,
)
from tinygen.codegen.output import write_tree  # noqa: F401 - its home before output.py
from tinygen.compiler import Compiled, options_text
from tinygen.errors import TinygenError
from tinygen.ir import storage_perm
from tinygen.kernels import KERNELS
from tinygen.passes.layout import storage_data
from tinygen.plan.lifetimes import scratch_name
from tinygen.resources import runtime_dir, templates_dir

RUNTIME = runtime_dir()
TEMPLATES = templates_dir()


def _env() -> jinja2.Environment:
    return jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)),
                              trim_blocks=True, lstrip_blocks=True,
                              undefined=jinja2.StrictUndefined, keep_trailing_newline=True)


# Value range of each I/O buffer type, as C constant expressions.
IO_RANGES = {"int8": ("(-128)", "127"), "uint8": ("0", "255"),
             "int32": ("(-2147483647 - 1)", "2147483647")}


class TreeWriter:
    """Builds the template context for one compiled model."""

    def __init__(self, c: Compiled, flags: str):
        self.c = c
        self.g = c.graph
        self.plan = c.plan
        self.P = c.options.prefix
        self.G = self.P.upper()
        self.flags = flags
        self.pw = ParamsWriter(self.P)
        self.const_names: dict[str, str] = {}
        self.families: set[str] = set()

    # -- pointers -----------------------------------------------------------------------
    def ptr(self, name: str) -> str:
        """C expression (uint8_t* or void*) for where tensor `name` lives."""
        t = self.g.tensors[name]
        if t.is_const:
            return self.const_array(name)
        buf, off = self.plan.offset_of(name)
        if buf.external:
            kind, idx = buf.external.split(":")
            return f"{kind}s[{idx}]"
        base = "a" if buf.region in (None, self.plan.regions[0].name) else \
            f"{self.P}_region_{buf.region}.bytes"
        return f"({base} + {off})" if off else base

    def scratch_ptr(self, k: int) -> str:
        """void * expression of op k's scratch buffer, or NULL when it needs none."""
        buf = self.plan.buffers.get(scratch_name(k))
        if buf is None:
            return "NULL"
        base = "a" if buf.region in (None, self.plan.regions[0].name) else \
            f"{self.P}_region_{buf.region}.bytes"
        return f"(void *)({base} + {buf.offset})" if buf.offset else f"(void *){base}"

    def const_array(self, name: str) -> str:
        if name not in self.const_names:
            t = self.g.tensors[name]
            cname = f"{self.P}_c{len(self.const_names)}"
            data = storage_data(t).astype(np.int32 if t.dtype == "int32" else np.int8)
            self.pw.decls.append(f"/* {c_comment_text(t.name)} [{'x'.join(map(str, t.shape))}]"
                                 " */\n" + c_array(cname, data))
            self.pw.const_bytes += data.nbytes
            self.const_names[name] = cname
        return self.const_names[name]

    def typed(self, name: str, const: bool) -> str:
        t = self.g.tensors[name]
        if t.is_const:
            return self.const_array(name)
        ctype = C_TYPES[t.dtype]
        return f"({'const ' if const else ''}{ctype} *){self.ptr(name)}"

    # -- calls --------------------------------------------------------------------------
    def op_lines(self, k: int, index: int) -> list[str]:
        """C lines for graph op k, the index-th kernel call of the run function."""
        op = self.g.ops[k]
        if op.kind == "copy":
            t = self.g.tensors[op.outputs[0]]
            return [f"memcpy({self.ptr(op.outputs[0])}, {self.ptr(op.inputs[0])}, {t.nbytes}u);"]
        if op.kind == "stream":
            return self.stream_lines(op.attrs["run"], index)
        call = op.attrs["call"]
        kern = KERNELS[call.func]
        self.families.add(kern.family)
        if call.func == "tg_lut":
            tname = f"{self.P}_table{index}"
            self.pw.decls.append(c_array(tname, call.params.table))
            self.pw.const_bytes += 256
            return [f"tg_lut({tname}, {self.typed(call.args[0], True)}, "
                    f"{self.typed(call.args[1], False)}, {call.params.count});"]
        pname = self.pw.struct(kern.struct, f"{self.P}_op{index}", call.params)
        if call.func == "tg_concat":
            parts = ", ".join(self.typed(n, True) for n in call.args[:-1])
            arr = f"{self.P}_parts{index}"
            return [f"{{ const int8_t *const {arr}[{len(call.args) - 1}] = {{{parts}}};",
                    f"  tg_concat(&{pname}, {arr}, {self.typed(call.args[-1], False)}); }}"]
        args = [self.typed(n, True) if n else "NULL" for n in call.args[:-1]]
        args.append(self.typed(call.args[-1], False))
        if kern.rows:  # spatial kernel: scratch, then the output rows (here all of them)
            args += [self.scratch_ptr(k), "0", str(call.params.out_h)]
        if call.batch > 1:  # the same call on consecutive slices
            args = [f"{a} + {st} * b" if st and a != "NULL" else a
                    for a, st in zip(args, call.batch_step, strict=True)]
            return [f"{{ int32_t b; for (b = 0; b < {call.batch}; ++b) {{",
                    f"    {call.func}(&{pname}, {', '.join(args)});", "} }"]
        return [f"{call.func}(&{pname}, {', '.join(args)});"]

    def stream_lines(self, run, index: int) -> list[str]:
        """A streamed run (passes/stream.py): a loop over bands, each calling every member
        on its rows from a flash table [band][member][row0, row1] (empty ranges skipped)."""
        table = f"{self.P}_bands{index}"
        rows = np.array(run.rows, dtype=np.int32).reshape(len(run.rows), -1)
        kind = "uint16_t" if rows.max() <= 0xFFFF else "int32_t"
        body = ",\n".join("    {" + ", ".join(f"{v}" for v in r) + "}" for r in rows)
        self.pw.decls.append(f"/* rows [row0, row1) of each layer per band */\n"
                             f"static const {kind} {table}[{len(rows)}][{rows.shape[1]}] = "
                             f"{{\n{body}\n}};")
        self.pw.const_bytes += rows.size * (2 if kind == "uint16_t" else 4)
        scratch = f"(void *){self.ptr(run.scratch)}" if run.scratch else "NULL"
        lines = ["{", "    int32_t band;", f"    for (band = 0; band < {len(rows)}; ++band) {{",
                 f"        const {kind} *r = {table}[band];"]
        for j, m in enumerate(run.members):
            call = m.call
            kern = KERNELS[call.func]
            self.families.add(kern.family)
            pname = self.pw.struct(kern.struct, f"{self.P}_op{index}_{j}", call.params)
            args = [self.typed(n, True) if n else "NULL" for n in call.args[:-1]]
            args += [self.typed(call.args[-1], False), scratch,
                     f"(int32_t)r[{2 * j}]", f"(int32_t)r[{2 * j + 1}]"]
            lines += [f"        if (r[{2 * j}] < r[{2 * j + 1}]) {{",
                      f"            {call.func}(&{pname}, {', '.join(args)});", "        }"]
        return lines + ["    }", "}"]

    def io_entries(self, ios, is_input: bool) -> list[dict]:
        """What the header says about each input/output: C type, range, storage dims."""
        out = []
        kind = "input" if is_input else "output"
        for index, io in enumerate(ios):
            t = self.g.tensors[io.name]
            buf, _ = self.plan.offset_of(io.name)
            dims = list(t.storage_shape())
            q = io.quant
            lo, hi = IO_RANGES[io.buffer_dtype]
            entry = {
                "index": index,
                "comment": c_comment_text(io.onnx_name, 60),
                "ctype": C_TYPES[io.buffer_dtype],
                "tname": f"{self.P}_{kind}_{index}_t",
                "macro": f"{self.G}_{kind.upper()}_{index}",
                "elem": io.buffer_dtype.upper(),
                "lo": lo, "hi": hi,
                "dims": dims, "rank": len(dims),
                "onnx_axes": list(storage_perm(len(t.shape), t.layout)),
                "onnx_dims_comment": "x".join(map(str, t.shape)),
                "dims_comment": "x".join(map(str, dims)),
                "size": t.size,
                "bytes": t.nbytes,
                "quant": q is not None and io.buffer_dtype != "int32",
                "scale": "0.0f", "zp": "0",
                "arena_expr": None if buf.external else f"(void *){self.ptr(io.name)}",
            }
            if entry["quant"]:
                zp = q.scalar_zp() + (128 if io.buffer_dtype == "uint8" else 0)
                entry["scale"] = c_float(q.scalar_scale())
                entry["zp"] = str(zp)
            out.append(entry)
        return out

    def flips(self, ios, kind: str) -> list[str]:
        lines = []
        for io in ios:
            if io.buffer_dtype == "uint8":
                t = self.g.tensors[io.name]
                lines.append(f"{self.P}_flip_sign_bits({self.ptr(io.name)}, {t.size}u);")
        return lines

    def context(self) -> dict:
        g, c = self.g, self.c
        calls = []
        for k in self.plan.order:
            op = g.ops[k]
            if op.kind == "view":
                continue
            where = c_comment_text(f"{op.onnx_op} '{op.name}'", 100)
            before = self.pw.const_bytes
            lines = self.op_lines(k, len(calls))
            calls.append({"index": len(calls), "op_index": k,
                          "comment": f"{call_label(op)} <- {where}",
                          "lines": lines,
                          "const_bytes": self.pw.const_bytes - before})  # this call's flash
        pro, epi = self.flips(g.inputs, "input"), self.flips(g.outputs, "output")
        if c.options.io == "external":
            # restore the caller's uint8 inputs (they were shifted in place)
            epi = epi + pro
        headers = ["tg_config.h", "tg_requant.h"] + sorted(f"tg_{f}.h" for f in self.families)
        extra = [{"name": r.name, "upper": r.name.upper(), "bytes": r.used}
                 for r in self.plan.regions[1:]]
        return {
            "P": self.P, "G": self.G, "version": tinygen.__version__,
            "model_comment": c_comment_text(g.name, 80),
            "source_comment": c_comment_text(os.path.basename(g.source_path), 80),
            "sha256": g.source_sha256, "flags_comment": c_comment_text(self.flags, 200),
            "arena_bytes": self.plan.regions[0].used, "lower_bound": self.plan.lower_bound,
            "naive_bytes": self.plan.naive, "align": self.plan.align,
            "const_bytes": self.pw.const_bytes, "macs": c.macs, "n_calls": len(calls),
            "inputs": self.io_entries(g.inputs, True),
            "outputs": self.io_entries(g.outputs, False),
            "io_mode_comment": "--io " + c.options.io,
            "io_external": c.options.io == "external",
            "max_rank": max([len(self.g.tensors[io.name].shape)
                             for io in [*g.inputs, *g.outputs]] + [1]),
            "decls": self.pw.decls, "calls": calls, "headers": headers,
            "prologue": pro, "epilogue": epi, "flips": bool(pro or epi),
            "extra_regions": extra, "float_mode": c.options.requant == "float",
            "needs": config_needs(c),
        }


def call_label(op) -> str:
    """What an op runs, for comments: its kernel, or a streamed run's kernels."""
    if op.kind == "stream":
        return "stream(" + ", ".join(m.call.func for m in op.attrs["run"].members) + ")"
    return op.attrs["call"].func if "call" in op.attrs else op.kind


def config_needs(c: Compiled) -> list[str]:
    """The tg_config.h switches this model's kernels must have on (DEVELOPERS.md, "Kernel
    configuration"): <prefix>.c refuses to compile against kernels configured without them,
    and a folder shared by several models turns on every switch one of them needs."""
    needs = ["TG_WITH_FLOAT_REQUANT"] if c.options.requant == "float" else []
    if c.options.kernels == "portable":  # same outputs, plain C: safe for every model
        needs.append("TG_KERNELS_PORTABLE")
    return needs


# Private headers a kernel family's C file includes besides its own header.
PRIVATE_HEADERS = {"conv": ("tg_mat.h", "tg_window.h"), "pwconv": ("tg_mat.h",),
                   "fc": ("tg_mat.h",),
                   "pool": ("tg_window.h",)}


def runtime_files(families: set[str]) -> list[tuple[str, Path]]:
    files = [("tg_requant.h", RUNTIME / "include" / "tg_requant.h"),
             ("tg_arm_dsp.h", RUNTIME / "include" / "tg_arm_dsp.h"),
             ("tg_wide.h", RUNTIME / "include" / "tg_wide.h"),
             ("tg_arm_mve.h", RUNTIME / "include" / "tg_arm_mve.h")]
    private = sorted({h for f in families for h in PRIVATE_HEADERS.get(f, ())})
    files += [(h, RUNTIME / "include" / h) for h in private]
    for f in sorted(families):
        files.append((f"tg_{f}.h", RUNTIME / "include" / f"tg_{f}.h"))
        files.append((f"tg_{f}.c", RUNTIME / "src" / f"tg_{f}.c"))
    return files


def kernel_files(families) -> dict[str, str]:
    """{name: text} of the runtime files the kernel families need (byte copies)."""
    return {name: src.read_text() for name, src in runtime_files(set(families))}


def runtime_file_names() -> set[str]:
    """Every runtime file name a tree may hold."""
    return {name for name, _ in runtime_files({k.family for k in KERNELS.values()})}


def render_shared(models, needs: list[str]) -> dict[str, str]:
    """tg_config.h for kernels serving `models` (codegen.folder.FolderModel: prefix,
    families, needs) and each model's build snippets, which list its .c and its kernels."""
    env = _env()
    files = {"tg_config.h": env.get_template("tg_config.h.j2").render(
        needs=needs, models=[(m.prefix, m.requant) for m in models])}
    for m in models:
        sources = sorted([f"{m.prefix}.c", *(f"tg_{f}.c" for f in m.families)])
        ctx = {"P": m.prefix, "G": m.prefix.upper(), "sources": sources, "needs": needs}
        files[f"{m.prefix}_sources.cmake"] = env.get_template("sources.cmake.j2").render(**ctx)
        files[f"{m.prefix}_sources.mk"] = env.get_template("sources.mk.j2").render(**ctx)
    return files


def render_tree(c: Compiled, flags: str) -> dict[str, str]:
    """All files of the tree as {name: text}, deterministic for the same input."""
    try:
        check_prefix(c.options.prefix)
    except ValueError as exc:
        raise TinygenError(str(exc)) from None
    env = _env()
    # The calls' C depends on the compiled model only, not on the flags line: compile_model
    # renders once for the flash figure and emit again with the flags, so keep the context
    # (for a 100,000-op model writing the calls is most of the time).
    key = (id(c.graph), len(c.graph.ops), id(c.plan), options_text(c.options),
           tuple(b.offset for b in c.plan.buffers.values()), tuple(c.plan.order))
    cached = getattr(c, "_tree_context", None)
    if cached is not None and cached[0] == key:
        families, ctx = cached[1], dict(cached[2])
        ctx["flags_comment"] = c_comment_text(flags, 200)
    else:
        w = TreeWriter(c, flags)
        ctx = w.context()  # renders calls first so the constants/families are known
        ctx["const_bytes"] = w.pw.const_bytes
        families = w.families
        c._tree_context = (key, families, ctx)
    P = ctx["P"]
    files: dict[str, str] = {}
    files[f"{P}.c"] = env.get_template("model.c.j2").render(**ctx)
    files[f"{P}.h"] = env.get_template("model.h.j2").render(**ctx)
    files.update(kernel_files(families))
    from tinygen.codegen.folder import FolderModel
    files.update(render_shared([FolderModel(P, sorted(families), ctx["needs"])],
                               ctx["needs"]))
    c.const_bytes = ctx["const_bytes"]
    return files


def add_model_to_folder(c: Compiled, files: dict[str, str], out_dir: str) -> dict[str, str]:
    """emit --add: the model's rendered tree merged with the models already in out_dir."""
    from tinygen.codegen.folder import add_to_folder
    families = sorted(n[3:-2] for n in files if n.startswith("tg_") and n.endswith(".c"))
    return add_to_folder(files, c.options.prefix, families, config_needs(c), out_dir)
