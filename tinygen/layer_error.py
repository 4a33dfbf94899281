"""Quantization error per layer: SQNR of every int8 tensor against the float model.

The float reference is either the model before quantization (`--float-model FILE`) or, for a
QDQ model, the float graph recovered from the quantized file itself (`float_graph_from_qdq`:
every QuantizeLinear -> DequantizeLinear pair dropped, weights replaced by their dequantized
values). Both are run on the same float inputs as the C, and each int8 tensor of the compiled
graph is matched to one float tensor (`FloatMatcher`, rules in docs/numerics.md):

  1. a tensor written by a QuantizeLinear matches that node's float input; a QLinear* output
     named `<x>_quantized` matches `<x>`; a graph input matches itself;
  2. a view (Reshape, Flatten, a QuantizeLinear that keeps the scale) matches on its own name,
     so the same bytes can match the float tensor of either side;
  3. fused activations: when the matched float tensor feeds only a Relu/Clip that the quantized
     model no longer has (the quantizer folded it into the output range), the match moves to
     that activation's output, which is what the int8 values hold;
  4. layout: int8 tensors are compared in ONNX layout (channels-last storage transposed back),
     and the element counts must agree; anything else is left unmatched and reported so.

SQNR = 10 log10(sum f^2 / sum (f - r)^2) over every element of every sample, with f the float
value and r = scale * (q - zero_point) the dequantized int8 value (the reference's, which the C
equals bit for bit). The layer where accuracy is lost most is the one whose SQNR falls the
furthest below the SQNR of its inputs.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from tinygen.compiler import Compiled, storage_inputs
from tinygen.errors import TinygenError
from tinygen.ir import Graph, Tensor, storage_perm
from tinygen.runner import run_reference_all

ACTIVATIONS_FOLDED = ("Relu", "Clip")
# Ops the quantizer folds a following Relu into (their QuantizeLinear then starts at zero).
RELU_HOSTS = ("Conv", "Gemm", "MatMul", "Add", "ConvTranspose")
INTEGER_OPS_PREFIX = ("QLinear", "QGemm", "ConvInteger", "MatMulInteger")


# ---------------------------------------------------------------------------- float graphs


def _constants(model) -> dict[str, np.ndarray]:
    from onnx import numpy_helper
    out = {i.name: numpy_helper.to_array(i) for i in model.graph.initializer}
    for n in model.graph.node:
        if n.op_type == "Constant":
            for a in n.attribute:
                if a.name == "value":
                    out[n.output[0]] = numpy_helper.to_array(a.t)
    return out


def is_qdq_model(model) -> bool:
    """QuantizeLinear/DequantizeLinear around float ops, no integer (QOperator) ops."""
    ops = {n.op_type for n in model.graph.node}
    return "QuantizeLinear" in ops and "DequantizeLinear" in ops and \
        not any(o.startswith(INTEGER_OPS_PREFIX) for o in ops)


def _dequantize_const(q: np.ndarray, scale: np.ndarray, zp: np.ndarray | None,
                      axis: int) -> np.ndarray:
    q = q.astype(np.float64)
    scale = np.asarray(scale, np.float64)
    zp = np.zeros_like(scale) if zp is None else np.asarray(zp, np.float64)
    if scale.size > 1:
        shape = [1] * q.ndim
        shape[axis % q.ndim] = -1
        scale, zp = scale.reshape(shape), zp.reshape(shape)
    return ((q - zp) * scale).astype(np.float32)


def float_graph_from_qdq(model) -> tuple[object, dict[str, str]]:
    """The float graph of a QDQ model and {quantized tensor name: float tensor name}.

    Every QuantizeLinear -> DequantizeLinear pair on an activation is dropped (its consumers
    read the float value again); a DequantizeLinear of a constant becomes that constant in
    float. Where a QuantizeLinear after a Conv/Gemm/MatMul/Add has its zero point at the
    type's minimum (how the quantizer folds a following Relu away), a Relu is put back, so
    the float graph computes what the int8 graph approximates. Weights stay their
    dequantized int8 values (the file no longer holds the float ones): the SQNR then measures
    activation quantization only.
    """
    import onnx
    from onnx import helper, numpy_helper

    consts = _constants(model)
    producers = {o: n for n in model.graph.node for o in n.output}
    alias: dict[str, str] = {}      # a Q or DQ output -> the float value it stands for
    q_to_float: dict[str, str] = {}
    new_inits, nodes, extra = [], [], []

    def attr(node, name, default):
        for a in node.attribute:
            if a.name == name:
                return helper.get_attribute_value(a)
        return default

    def resolve(name: str) -> str:
        seen = 0
        while name in alias and seen < 10_000:
            name, seen = alias[name], seen + 1
        return name

    for node in model.graph.node:
        if node.op_type == "Constant":
            continue
        if node.op_type == "DequantizeLinear" and node.input[0] in consts:
            q = consts[node.input[0]]
            zp = consts.get(node.input[2]) if len(node.input) > 2 and node.input[2] else None
            f = _dequantize_const(q, consts[node.input[1]], zp, attr(node, "axis", 1))
            new_inits.append(numpy_helper.from_array(f, node.output[0]))
            continue
        if node.op_type == "QuantizeLinear":
            if node.input[0] in consts:
                raise TinygenError("cannot recover the float graph: a QuantizeLinear of a "
                                   "constant (give --float-model)", node=node.name,
                                   op=node.op_type)
            x = resolve(node.input[0])
            zp = consts.get(node.input[2]) if len(node.input) > 2 and node.input[2] else None
            lowest = zp is not None and int(np.asarray(zp).reshape(-1)[0]) == \
                int(np.iinfo(np.asarray(zp).dtype).min)
            prod = producers.get(node.input[0])
            if lowest and prod is not None and prod.op_type in RELU_HOSTS:
                relu = f"{x}/relu_recovered"
                extra.append(helper.make_node("Relu", [x], [relu], name=relu))
                x = relu
            alias[node.output[0]] = x
            q_to_float[node.output[0]] = x
            continue
        if node.op_type == "DequantizeLinear":
            alias[node.output[0]] = resolve(node.input[0])
            continue
        copy = onnx.NodeProto()
        copy.CopyFrom(node)
        del copy.input[:]
        copy.input.extend(resolve(i) if i else i for i in node.input)
        nodes += extra + [copy]
        extra = []
    nodes += extra
    outputs = []
    for o in model.graph.output:
        src = resolve(o.name)
        if src != o.name:
            nodes.append(helper.make_node("Identity", [src], [o.name], name=f"{o.name}/out"))
        outputs.append(helper.make_tensor_value_info(o.name, onnx.TensorProto.FLOAT, None))
    used = {i for n in nodes for i in n.input}
    inits = [i for i in model.graph.initializer if i.name in used] + \
        [i for i in new_inits if i.name in used]
    for name, arr in consts.items():  # Constant nodes still read by float ops
        if name in used and name not in {i.name for i in inits}:
            inits.append(numpy_helper.from_array(arr, name))
    graph = helper.make_graph(nodes, model.graph.name + "_float", list(model.graph.input),
                              outputs, inits)
    out = helper.make_model(graph, opset_imports=list(model.opset_import))
    out.ir_version = model.ir_version
    return out, q_to_float


class FloatRunner:
    """Evaluates a float ONNX model, keeping any intermediate tensor asked for: onnxruntime
    when it is installed (all optimisations off, so no fusion changes an intermediate),
    otherwise onnx.reference."""

    def __init__(self, model, shown_as: str):
        self.model = model
        self.shown_as = shown_as
        self.values = {o for n in model.graph.node for o in n.output} | \
            {i.name for i in model.graph.input}
        self._sess = None
        self._names: list[str] = []

    def prepare(self, names: list[str]) -> None:
        import onnx
        from onnx import helper
        self._names = list(dict.fromkeys(names))
        try:
            import onnxruntime as ort
        except ImportError:
            ort = None
        if ort is None:
            from onnx.reference import ReferenceEvaluator
            self._ref = ReferenceEvaluator(self.model)
            return
        m = onnx.ModelProto()
        m.CopyFrom(self.model)
        have = {o.name for o in m.graph.output}
        for n in self._names:
            if n not in have:
                m.graph.output.append(helper.make_tensor_value_info(n, onnx.TensorProto.FLOAT,
                                                                    None))
        so = ort.SessionOptions()
        so.log_severity_level = 3
        so.graph_optimization_level = ort.GraphOptimizationLevel.ORT_DISABLE_ALL
        try:
            self._sess = ort.InferenceSession(m.SerializeToString(), so,
                                              providers=["CPUExecutionProvider"])
        except Exception as exc:  # onnxruntime raises its own exception types
            first = (str(exc).strip().splitlines() or ["(no message)"])[0][:200]
            raise TinygenError(f"onnxruntime cannot run the float model: {first}",
                               file=self.shown_as) from None

    def run(self, feeds: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
        if self._sess is not None:
            return dict(zip(self._names, self._sess.run(self._names, feeds), strict=True))
        got = self._ref.run(None, feeds, intermediate=True)
        return {n: np.asarray(got[n]) for n in self._names}


def load_float_model(path: str):
    import onnx

    from tinygen.user_input import read_user_file
    raw = read_user_file(path, "the float model")
    try:
        return onnx.load_from_string(raw)
    except Exception:
        raise TinygenError("cannot read the float model (not an ONNX file?)", file=path) from None


# ---------------------------------------------------------------------------- matching


class FloatMatcher:
    """Finds, for each int8 tensor of the compiled graph, the float tensor it approximates."""

    def __init__(self, quant_model, float_model, q_to_float: dict[str, str] | None = None):
        self.q_nodes = {o: n for n in quant_model.graph.node for o in n.output}
        self.q_dq_users: dict[str, list[str]] = {}  # a quantized tensor -> its DQ outputs
        for n in quant_model.graph.node:
            if n.op_type == "DequantizeLinear" and n.input:
                self.q_dq_users.setdefault(n.input[0], []).append(n.output[0])
        self.q_values = set(self.q_nodes) | {i.name for i in quant_model.graph.input}
        self.f_values = {o for n in float_model.graph.node for o in n.output} | \
            {i.name for i in float_model.graph.input}
        self.f_consumers: dict[str, list] = {}
        for n in float_model.graph.node:
            for i in n.input:
                self.f_consumers.setdefault(i, []).append(n)
        self.q_to_float = q_to_float

    def match(self, name: str) -> str | None:
        if self.q_to_float is not None:  # the recovered graph carries its own map
            cand = self.q_to_float.get(name, name)
            return cand if cand in self.f_values else None
        node = self.q_nodes.get(name)
        if node is not None and node.op_type == "QuantizeLinear":
            cand = node.input[0]
        elif name.endswith("_quantized"):
            cand = name[: -len("_quantized")]
        else:
            cand = name
        if cand not in self.f_values:
            # e.g. a graph output: the float model names the DequantizeLinear's output
            cand = next((d for d in self.q_dq_users.get(name, []) if d in self.f_values), None)
            if cand is None:
                return None
        for _ in range(8):  # fused activations: follow a folded Relu/Clip
            users = self.f_consumers.get(cand, [])
            if len(users) == 1 and users[0].op_type in ACTIVATIONS_FOLDED and \
                    users[0].output[0] not in self.q_values:
                cand = users[0].output[0]
            else:
                break
        return cand


# ---------------------------------------------------------------------------- SQNR


def sqnr_db(signal: float, noise: float) -> float | None:
    """10 log10(signal / noise); inf for no noise, None when there is no signal."""
    if signal <= 0:
        return None
    return math.inf if noise == 0 else 10 * math.log10(signal / noise)


def _fmt_db(v: float | None) -> str:
    if v is None:
        return "-"
    return "exact" if math.isinf(v) else f"{v:.1f}"


def _json_db(v: float | None):
    if v is None:
        return None
    return "inf" if math.isinf(v) else round(v, 3)


@dataclass
class LayerError:
    """One kernel call's output against its float counterpart."""

    call: int
    op_index: int
    kernel: str
    node: str
    onnx_op: str
    tensor: str
    float_name: str | None
    sqnr_db: float | None = None
    input_sqnr_db: float | None = None
    note: str = ""

    @property
    def drop_db(self) -> float | None:
        if self.sqnr_db is None or self.input_sqnr_db is None:
            return None
        if math.isinf(self.sqnr_db):
            return 0.0
        if math.isinf(self.input_sqnr_db):
            return math.inf
        return self.input_sqnr_db - self.sqnr_db

    def as_json(self) -> dict:
        return {"call": self.call, "op": self.op_index, "kernel": self.kernel,
                "node": self.node, "onnx_op": self.onnx_op, "tensor": self.tensor,
                "float_tensor": self.float_name, "sqnr_db": _json_db(self.sqnr_db),
                "input_sqnr_db": _json_db(self.input_sqnr_db),
                "drop_db": _json_db(self.drop_db), "note": self.note or None}


@dataclass
class QuantError:
    source: str                  # what the float reference was
    samples: int
    layers: list[LayerError]
    inputs: dict[str, float | None] = field(default_factory=dict)
    outputs: dict[str, float | None] = field(default_factory=dict)
    # the float model's own outputs per sample (for accuracy), not part of the JSON
    float_outputs: list[list[np.ndarray]] = field(default_factory=list, repr=False)

    @property
    def worst(self) -> LayerError | None:
        """The layer whose SQNR falls the furthest below its inputs'."""
        rated = [lay for lay in self.layers if lay.drop_db is not None]
        return max(rated, key=lambda lay: lay.drop_db) if rated else None

    def as_json(self) -> dict:
        w = self.worst
        return {"float_reference": self.source, "samples": self.samples,
                "inputs_sqnr_db": {k: _json_db(v) for k, v in self.inputs.items()},
                "outputs_sqnr_db": {k: _json_db(v) for k, v in self.outputs.items()},
                "most_lost": None if w is None else {"call": w.call, "node": w.node,
                                                     "drop_db": _json_db(w.drop_db)},
                "layers": [lay.as_json() for lay in self.layers]}

    def lines(self) -> list[str]:
        from tinygen.report.plan_view import short_name
        outs = ", ".join(f"{short_name(k, 30)} {_fmt_db(v)} dB" for k, v in self.outputs.items())
        ins = ", ".join(f"{short_name(k, 30)} {_fmt_db(v)} dB" for k, v in self.inputs.items())
        out = [f"quantization error (SQNR vs {self.source}, {self.samples} samples): "
               f"output {outs}; input {ins}"]
        w = self.worst
        if w is not None:
            out.append(f"  most lost at kernel call {w.call}: {w.kernel} from ONNX node "
                       f"'{short_name(w.node, 60)}' ({w.onnx_op}), {_fmt_db(w.sqnr_db)} dB "
                       f"after {_fmt_db(w.input_sqnr_db)} dB at its inputs "
                       f"(-{_fmt_db(w.drop_db)} dB)")
        rows = [["call", "kernel", "ONNX node", "ONNX op", "SQNR dB", "drop dB", ""]]
        for lay in self.layers:
            rows.append([str(lay.call), lay.kernel, short_name(lay.node, 34), lay.onnx_op,
                         _fmt_db(lay.sqnr_db), _fmt_db(lay.drop_db),
                         lay.note or ("<- most lost" if lay is w else "")])
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        out += ["  " + "  ".join(v.ljust(wd) for v, wd in zip(r, widths, strict=True)).rstrip()
                for r in rows]
        return out


def _dequantized(t: Tensor, storage: np.ndarray) -> np.ndarray:
    """Real values of an int8-domain storage array, in ONNX layout (float64)."""
    perm = storage_perm(len(t.shape), t.layout)
    q = np.transpose(np.asarray(storage).reshape(t.storage_shape()), np.argsort(perm))
    return (q.astype(np.float64) - t.quant.scalar_zp()) * float(np.float32(t.quant.scalar_scale()))


def real_values(g: Graph, name: str, env: dict[str, np.ndarray]) -> np.ndarray:
    """The real values of tensor `name` in ONNX layout and shape. A view's bytes are its
    source's, stored in the source's layout (a Flatten after a channels-last tensor is not
    in ONNX order): its ONNX value is the source's ONNX value reshaped, as ONNX defines."""
    root = name
    for _ in range(len(g.ops) + 1):
        prod = g.producer(root)
        if prod is None or prod.kind != "view":
            break
        root = prod.inputs[0]
    return _dequantized(g.tensors[root], env[root]).reshape(g.tensors[name].shape)


def float_feeds(g: Graph, floats: list[np.ndarray]) -> dict[str, np.ndarray]:
    feeds = {}
    for io, x in zip(g.inputs, floats, strict=True):
        dt = np.float32 if io.onnx_dtype == "float32" else np.dtype(io.onnx_dtype)
        feeds[io.onnx_name] = np.asarray(x).astype(dt).reshape(g.tensors[io.name].shape)
    return feeds


@dataclass
class FloatReference:
    """A float model ready to run, with the matcher for the compiled graph's tensors."""

    runner: FloatRunner
    matcher: FloatMatcher
    source: str
    output_names: list[str]


def float_reference(c: Compiled, model_path: str, float_model: str | None) -> FloatReference:
    """The given float model, or the float graph recovered from a QDQ model. Raises
    TinygenError when neither is possible (a QOperator model without --float-model)."""
    quant = load_float_model(model_path)
    if float_model:
        fm = load_float_model(float_model)
        return FloatReference(FloatRunner(fm, float_model), FloatMatcher(quant, fm),
                              f"float model {float_model.rsplit('/', 1)[-1]}",
                              [o.name for o in fm.graph.output])
    if not is_qdq_model(quant):
        raise TinygenError("per-layer SQNR of a QOperator model needs the model before "
                           "quantization: give --float-model FILE.onnx", file=model_path)
    fm, q_to_float = float_graph_from_qdq(quant)
    return FloatReference(FloatRunner(fm, model_path), FloatMatcher(quant, fm, q_to_float),
                          "the float graph recovered from the QDQ model (Q/DQ pairs dropped, "
                          "weights as their dequantized values)",
                          [o.name for o in fm.graph.output])


def _tensor_rows(c: Compiled) -> list[tuple[int | None, int | None, str]]:
    """(call, op index, tensor) for every activation: graph inputs, calls, then views."""
    rows: list[tuple[int | None, int | None, str]] = [(None, None, io.name)
                                                      for io in c.graph.inputs]
    call = 0
    for k in c.plan.order:
        op = c.graph.ops[k]
        if op.kind == "view":
            rows.append((None, k, op.outputs[0]))
            continue
        rows.append((call, k, op.outputs[0]))
        call += 1
    return rows


def quantization_error(c: Compiled, ref: FloatReference, samples: list[list[np.ndarray]],
                       progress=None) -> QuantError:
    """SQNR of every matched int8 tensor over `samples` (float inputs, ONNX layout)."""
    from tinygen.report.plan_view import kernel_of
    g = c.graph
    rows = _tensor_rows(c)
    names = {}
    for _, _, tname in rows:
        t = g.tensors[tname]
        if t.dtype != "int8" or t.quant is None:
            continue
        m = ref.matcher.match(tname)
        if m is not None:
            names[tname] = m
    ref.runner.prepare(list(names.values()) + ref.output_names)
    signal = dict.fromkeys(names, 0.0)
    noise = dict.fromkeys(names, 0.0)
    bad_shape: set[str] = set()
    float_outputs = []
    for n, floats in enumerate(samples):
        env = run_reference_all(g, storage_inputs(g, floats), c.plan.order)
        values = ref.runner.run(float_feeds(g, floats))
        float_outputs.append([values[o] for o in ref.output_names])
        for tname, fname in names.items():
            t = g.tensors[tname]
            f = np.asarray(values[fname], np.float64)
            if f.size != t.size:
                bad_shape.add(tname)
                continue
            r = real_values(g, tname, env).reshape(f.shape)
            signal[tname] += float(np.sum(f * f))
            noise[tname] += float(np.sum((f - r) ** 2))
        if progress is not None:
            progress.step(n + 1)
    db = {t: None if t in bad_shape else sqnr_db(signal[t], noise[t]) for t in names}
    layers = []
    for call, k, tname in rows:
        if call is None:
            continue
        op = g.ops[k]
        lay = LayerError(call, k, kernel_of(op), op.name, op.onnx_op, tname, names.get(tname))
        if tname in bad_shape:
            lay.note = "float tensor has another element count"
        elif tname not in names:
            lay.note = "no float counterpart"
        else:
            lay.sqnr_db = db[tname]
        ins = [_db_through_views(g, i, db) for i in op.inputs
               if i in g.tensors and not g.tensors[i].is_const]
        ins = [v for v in ins if v is not None]
        lay.input_sqnr_db = min(ins) if ins else None
        layers.append(lay)
    return QuantError(ref.source, len(samples), layers,
                      {io.onnx_name: db.get(io.name) for io in g.inputs},
                      {io.onnx_name: db.get(io.name) for io in g.outputs}, float_outputs)


def _db_through_views(g: Graph, name: str, db: dict) -> float | None:
    """The tensor's SQNR, or, for a view without one of its own, that of what it aliases."""
    for _ in range(len(g.ops) + 1):
        if db.get(name) is not None:
            return db[name]
        prod = g.producer(name)
        if prod is None or prod.kind != "view":
            return None
        name = prod.inputs[0]
    return None


def quantization_error_or_note(c: Compiled, model_path: str, samples, float_model: str | None,
                               progress=None) -> tuple[QuantError | None, str]:
    """Per-layer SQNR against `float_model`, or, for a QDQ model without one, its recovered
    float graph: (QuantError, "") or (None, why there is none). An unusable given float
    model is an error; the automatic recovery only ever becomes a note."""
    try:
        ref = float_reference(c, model_path, float_model)
    except TinygenError as exc:
        if float_model:
            raise
        return None, exc.reason
    if c.options.stream != "off":
        # a streamed run is one op; per layer needs each layer's own output (same values:
        # streaming changes no value, tests/stream)
        from dataclasses import replace

        from tinygen.compiler import compile_model
        c = compile_model(model_path, replace(c.options, stream="off"))
    return quantization_error(c, ref, samples, progress), ""
