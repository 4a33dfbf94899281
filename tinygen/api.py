"""tinygen from Python: compile a model, run its C on numpy arrays, read its figures.

    import tinygen
    model = tinygen.compile("pump.onnx", requant="float")
    scores = model.run(window)[0]          # the emitted C, built for this machine
    print(model.arena_bytes, model.flash_bytes, model.macs)

Arrays go in and come out in ONNX layout and type: float inputs are quantized by the
emitted C's own helpers, float outputs dequantized the same way, so a run exercises exactly
the code a firmware calls. docs/python.md has the whole surface.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tinygen.compiler import (
    BuildOptions,
    Compiled,
    compile_model,
    dequantize_outputs,
    logical_outputs,
    options_text,
    storage_inputs,
    summary,
)
from tinygen.errors import TinygenError


@dataclass(frozen=True)
class TensorInfo:
    """One input or output as the caller sees it."""

    name: str                          # the ONNX name
    shape: tuple[int, ...]             # ONNX layout
    dtype: str                         # what run() takes/returns: float32, int8, uint8, int32
    c_type: str                        # the C buffer's element: int8, uint8 or int32
    storage_shape: tuple[int, ...]     # the C buffer's dims (rank-3/4: channels-last)
    scale: float | None                # real = scale * (q - zero_point), q in c_type
    zero_point: int | None


def _tensor_infos(c: Compiled, ios) -> list[TensorInfo]:
    out = []
    for io in ios:
        t = c.graph.tensors[io.name]
        q = io.quant if io.buffer_dtype != "int32" else None
        zp = None if q is None else q.scalar_zp() + (128 if io.buffer_dtype == "uint8" else 0)
        out.append(TensorInfo(io.onnx_name, tuple(t.shape), io.onnx_dtype, io.buffer_dtype,
                              tuple(t.storage_shape()),
                              None if q is None else float(np.float32(q.scalar_scale())), zp))
    return out


class Model:
    """A compiled model: its figures, its C tree, and a host build of that C to run.

    Made by tinygen.compile(). The host library is built on the first run() and kept
    loaded; close() (or a with-block) removes its work folder.
    """

    def __init__(self, path: str, options: BuildOptions):
        self.path = str(path)
        self.options = options
        self.compiled: Compiled = compile_model(self.path, options)
        self.inputs = _tensor_infos(self.compiled, self.compiled.graph.inputs)
        self.outputs = _tensor_infos(self.compiled, self.compiled.graph.outputs)
        self._session = None

    # -- figures -----------------------------------------------------------------------
    @property
    def arena_bytes(self) -> int:
        """RAM the model needs: the planned arena (every region together)."""
        return self.compiled.plan.arena_bytes

    @property
    def lower_bound_bytes(self) -> int:
        """The largest sum of tensors live at one step: no plan of this order needs less."""
        return self.compiled.plan.lower_bound

    @property
    def weights_bytes(self) -> int:
        """Constant tensors the ops read (weights, biases)."""
        return self.compiled.weights_bytes

    @property
    def flash_bytes(self) -> int:
        """Every flash constant of the emitted tree: weights, requant parameters, tables and
        parameter structs (the kernels' code is extra: see emulate for a whole image)."""
        return self.compiled.const_bytes

    @property
    def macs(self) -> int:
        """Multiply-accumulates of one run."""
        return self.compiled.macs

    @property
    def figures(self) -> dict:
        """The figures `tinygen plan --json` prints, plus flash_bytes (= const_bytes)."""
        return dict(summary(self.compiled), const_bytes=self.flash_bytes,
                    flash_bytes=self.flash_bytes)

    @property
    def per_op(self) -> list[dict]:
        """One entry per kernel call in run order: index, kernel, ONNX node and op, MACs."""
        from tinygen.target_check import call_rows
        return call_rows(self.compiled)

    # -- running -----------------------------------------------------------------------
    def _feeds(self, args, feeds) -> dict[str, np.ndarray]:
        names = [t.name for t in self.inputs]
        if args and feeds:
            raise TinygenError("run(): give inputs by position or by name, not both")
        if len(args) == 1 and isinstance(args[0], dict):
            feeds = dict(args[0])
        elif args:
            if len(args) != len(names):
                raise TinygenError(f"run(): the model takes {len(names)} input(s), "
                                   f"{len(args)} given")
            feeds = dict(zip(names, args, strict=True))
        missing = [n for n in names if n not in feeds]
        extra = [n for n in feeds if n not in names]
        if missing or extra:
            raise TinygenError(f"run(): inputs are {names}; missing {missing}, unknown {extra}")
        out = {}
        for t in self.inputs:
            x = np.asarray(feeds[t.name])
            if x.size != int(np.prod(t.shape)):
                raise TinygenError(f"run(): input '{t.name}' has shape {list(x.shape)}, the "
                                   f"model takes {list(t.shape)}")
            out[t.name] = x.reshape(t.shape)
        return out

    def run(self, *inputs, **named) -> list[np.ndarray]:
        """Run the emitted C once: run(x), run(x0, x1), run({"name": x}) or run(name=x).

        Inputs in ONNX layout (float32 for a float input); outputs in ONNX layout and dtype.
        """
        feeds = self._feeds(inputs, named)
        if self._session is None:
            from tinygen.harness.session import Session
            self._session = Session(self.path, compiled=self.compiled,
                                    flags=options_text(self.options))
        return self._session.run(feeds)

    def reference(self, *inputs, **named) -> list[np.ndarray]:
        """The numpy reference of the same integer arithmetic, same form as run(): the C
        must equal it bit for bit."""
        from tinygen.runner import run_reference
        feeds = self._feeds(inputs, named)
        g = self.compiled.graph
        st = storage_inputs(g, [np.asarray(feeds[t.name], dtype=np.float32)
                                for t in self.inputs])
        outs = logical_outputs(g, run_reference(g, st, self.compiled.plan.order))
        return dequantize_outputs(g, outs)

    def emit(self, out_dir: str | Path, *, force: bool = False, add: bool = False
             ) -> list[str]:
        """Write the C tree (as `tinygen emit`); add=True adds it to a folder of models."""
        from tinygen.codegen.emit import add_model_to_folder, render_tree
        from tinygen.codegen.output import write_tree
        files = render_tree(self.compiled, options_text(self.options))
        if add:
            files = add_model_to_folder(self.compiled, files, str(out_dir))
        return write_tree(files, str(out_dir), force, add=add, protect=[self.path])

    def check(self, samples: int = 100, *, against_onnxruntime: bool = False,
              seed: int = 0) -> dict:
        """`tinygen check`: C vs the reference on random inputs over each input's whole
        quantized range; the same keys as `check --json`."""
        from tinygen.check import random_inputs, run_check
        res = run_check(self.compiled, self.path, random_inputs(self.compiled.graph, samples,
                                                                 seed=seed),
                        options_text(self.options), against_onnxruntime)
        return res.as_json()

    def close(self) -> None:
        """Drop the host build's work folder (the model stays usable: run() rebuilds)."""
        if self._session is not None:
            self._session.close()
            self._session = None

    def __enter__(self) -> Model:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return (f"<tinygen.Model {Path(self.path).name}: arena {self.arena_bytes} B, flash "
                f"{self.flash_bytes} B, {self.macs} MACs>")


def compile(model: str | Path, *, requant: str = "fixed", prefix: str = "model",
            input_shapes: list[str] | None = None, planner: str = "auto",
            order: str = "given", align: int = 8, arena_limit: int | str | None = None,
            flash_limit: int | str | None = None, inplace: bool = True,
            regions: list[tuple[str, int | str]] | None = None, io: str = "arena") -> Model:
    """Compile an 8-bit quantized ONNX model; the keywords are the CLI's build flags
    (docs/cli.md). Sizes take 262144, "256K", "1M" or "0x40000". Raises TinygenError
    for a model or flag tinygen cannot take (error.one_line() is the CLI's message)."""
    from tinygen.codegen.cfmt import check_prefix
    try:
        check_prefix(prefix)
    except ValueError as exc:
        raise TinygenError(str(exc)) from None
    opts = BuildOptions(requant=requant, prefix=prefix, input_shapes=list(input_shapes or []),
                        planner=planner, order=order, align=align,
                        arena_limit=_size(arena_limit), flash_limit=_size(flash_limit),
                        inplace=inplace,
                        regions=[(n, _size(s)) for n, s in (regions or [])], io=io)
    from tinygen.plan import PLANNERS
    for name, value, allowed in (("requant", requant, ("fixed", "float")),
                                 ("planner", planner, tuple(PLANNERS)),
                                 ("order", order, ("given", "min-peak")),
                                 ("io", io, ("arena", "external"))):
        if value not in allowed:
            raise TinygenError(f"{name} must be one of {', '.join(allowed)}, not '{value}'")
    return Model(str(model), opts)


def _size(value: int | str | None) -> int | None:
    if value is None or isinstance(value, int):
        return value
    from tinygen.cli import parse_size
    try:
        return parse_size(value)
    except Exception as exc:  # argparse's error type
        raise TinygenError(str(exc)) from None
