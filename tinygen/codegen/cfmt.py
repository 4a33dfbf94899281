"""Formatting Python values as C99: literals, const arrays, params structs, safe comments."""
from __future__ import annotations

import dataclasses
import re

import numpy as np

C_KEYWORDS = {
    "auto", "break", "case", "char", "const", "continue", "default", "do", "double", "else",
    "enum", "extern", "float", "for", "goto", "if", "inline", "int", "long", "register",
    "restrict", "return", "short", "signed", "sizeof", "static", "struct", "switch",
    "typedef", "union", "unsigned", "void", "volatile", "while", "_Bool", "_Complex",
    "_Imaginary",
}

C_TYPES = {"int8": "int8_t", "uint8": "uint8_t", "int16": "int16_t", "int32": "int32_t",
           "float32": "float"}


def c_comment_text(text: str, limit: int = 120) -> str:
    """Text from the model made safe inside a /* */ comment on one line.

    Only printable ASCII other than the backslash survives (anything else becomes \\xNN,
    \\uNNNN or \\UNNNNNNNN, so no text ends in a line splice); comment delimiters and
    trigraph starts are broken up.
    """
    out = []
    for ch in str(text):
        code = ord(ch)
        if 32 <= code < 127 and ch != "\\":
            out.append(ch)
        elif code < 256:
            out.append(f"\\x{code:02x}")
        elif code < 0x10000:
            out.append(f"\\u{code:04x}")
        else:
            out.append(f"\\U{code:08x}")
    s = "".join(out)
    s = s.replace("*/", "* /").replace("/*", "/ *").replace("//", "/ /")
    s = re.sub(r"\?(?=\?)", "?\\\\", s)  # no "??" left: ???/ becomes ?\?\?/
    if len(s) > limit:
        s = s[: limit - 3] + "..."
    return s


# <P.h> would shadow these when the tree is on the include path (C99 7.1.2).
C_STD_HEADERS = {
    "assert", "complex", "ctype", "errno", "fenv", "float", "inttypes", "iso646", "limits",
    "locale", "math", "setjmp", "signal", "stdarg", "stdbool", "stddef", "stdint", "stdio",
    "stdlib", "string", "tgmath", "time", "wchar", "wctype",
}


def check_identifier(name: str, what: str) -> str:
    if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,30}", name) or name in C_KEYWORDS:
        raise ValueError(f"{what} '{c_comment_text(name, 40)}' is not a C identifier "
                         "(letters, digits, _; not starting with a digit; at most 31; not a "
                         "keyword)")
    return name


def check_prefix(prefix: str) -> str:
    """The --prefix names files (P.c, P.h) and every model symbol (P_run, P_H, ...).

    A C identifier that starts with a letter (a leading underscore is reserved, C99 7.1.3),
    outside the runtime's tg_ / TG_ namespace and not the name of a standard header.
    """
    check_identifier(prefix, "--prefix")
    low = prefix.lower()
    if prefix.startswith("_"):
        raise ValueError(f"--prefix '{prefix}' starts with '_' (reserved in C)")
    if low == "tg" or low.startswith("tg_"):
        raise ValueError(f"--prefix '{prefix}' is in the tg_ namespace of the runtime kernels")
    if low in C_STD_HEADERS:
        raise ValueError(f"--prefix '{prefix}' would make {prefix}.h, which shadows the "
                         f"standard header <{low}.h>")
    return prefix


def c_int(v) -> str:
    v = int(v)
    if v == -(2**31):
        return "(-2147483647 - 1)"
    return str(v)


def c_float(v) -> str:
    f = float(np.float32(v))
    if not np.isfinite(f):
        raise ValueError(f"non-finite float {f} in generated parameters")
    s = f"{f:.9g}"
    if "e" not in s and "." not in s:
        s += ".0"
    return s + "f"


def c_array(name: str, data: np.ndarray, per_line: int = 16, static: bool = True) -> str:
    """`static const T name[N] = {...};` with N >= 1."""
    data = np.asarray(data).reshape(-1)
    ctype = C_TYPES[data.dtype.name]
    if data.dtype == np.float32:
        items = [c_float(v) for v in data] or ["0"]
    else:  # whole-array str(): one Python call per element is most of a big model's emit
        items = [c_int(v) if v == -(2**31) else str(v) for v in data.tolist()] or ["0"]
    lines = [", ".join(items[i:i + per_line]) for i in range(0, len(items), per_line)]
    body = ",\n    ".join(lines)
    return (f"{'static ' if static else ''}const {ctype} {name}[{max(len(items), 1)}] = "
            f"{{\n    {body}\n}};")


class ParamsWriter:
    """Turn a params dataclass into C: side arrays/structs first, then the initializer."""

    def __init__(self, prefix: str):
        self.prefix = prefix
        self.decls: list[str] = []
        self.const_bytes = 0

    def struct(self, ctype: str, name: str, params) -> str:
        init = self._init(name, params)
        text = f"static const {ctype} {name} = {init};"
        self.decls.append(text)
        self.const_bytes += _approx_struct_size(params)
        return name

    def _init(self, name: str, params) -> str:
        parts = []
        for f in dataclasses.fields(params):
            if not f.init or not f.compare:  # Python-side bookkeeping, not in the C struct
                continue
            v = getattr(params, f.name)
            parts.append(f".{f.name} = {self._value(f'{name}_{f.name}', v)}")
        return "{\n    " + ",\n    ".join(parts) + "\n}"

    def _value(self, name: str, v) -> str:
        if v is None:
            return "NULL"
        if dataclasses.is_dataclass(v):
            from tinygen.reference.requant import Requant
            ctype = "tg_requant_t" if isinstance(v, Requant) else None
            if ctype is None:
                raise TypeError(f"no C type for nested {type(v).__name__}")
            self.struct(ctype, name, v)
            return f"&{name}"
        if isinstance(v, np.ndarray):
            arr = np.ascontiguousarray(v)
            self.decls.append(c_array(name, arr))
            self.const_bytes += arr.nbytes
            return name
        if isinstance(v, (list, tuple)):
            if v and isinstance(v[0], np.ndarray):  # array of pointers (concat tables)
                names = []
                for i, a in enumerate(v):
                    names.append(self._value(f"{name}{i}", a))
                ptr_t = C_TYPES[np.asarray(v[0]).dtype.name]
                self.decls.append(f"static const {ptr_t} *const {name}[{len(names)}] = "
                                  f"{{{', '.join(names)}}};")
                return name
            if v and any(x is None for x in v):
                names = [self._value(f"{name}{i}", a) for i, a in enumerate(v)]
                self.decls.append(f"static const int8_t *const {name}[{len(names)}] = "
                                  f"{{{', '.join(names)}}};")
                return name
            return "{" + ", ".join(self._value(name, x) for x in v) + "}"
        if isinstance(v, (bool, np.bool_)):
            return "1" if v else "0"
        if isinstance(v, (int, np.integer)):
            return c_int(v)
        if isinstance(v, (float, np.floating)):
            return c_float(v)
        raise TypeError(f"cannot write {type(v).__name__} as C")


def _approx_struct_size(params) -> int:
    size = 0
    for f in dataclasses.fields(params):
        v = getattr(params, f.name)
        size += 4 * len(v) if isinstance(v, (list, tuple)) else 4
    return size
