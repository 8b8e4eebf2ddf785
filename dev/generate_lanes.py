"""Write the generated kernels of the Galaxy and the orbit engine from the table of component
kinds (``swerve.galaxy.kernels.COMPONENT_KINDS``):

* ``src/swerve/galaxy/dispatch.py``: the kind codes and the scalar dispatch
  (``component_accel``, ``component_potential``) over the kinds' scalar functions;
* ``src/swerve/orbit_lanes.py``: the Galaxy force and one DOP853 step for eight orbits at once,
  in explicit SIMD (:mod:`swerve.simd`).

The force formulas are declared once, as scalar numba functions (``swerve.galaxy.formulas``;
the rules a translated function follows are in its docstring); this script translates each
statement into lane-vector operations (``a * b`` becomes ``S.mul(a, b)``, ``x if u < c else y``
becomes ``S.where_less(u, c, x, y)``, scalars are broadcast with ``S.splat``).  A kind whose
table entry gives its lane statements (``lanes=``) gets those, translated the same way.  The
stepper's statements are written below (the same as ``swerve.orbits._dop853_step``).  Run from
the repository root after changing a force formula, the table or the stepper, then clear the
numba caches and run ``tests/test_orbit_lanes.py`` and ``tests/test_orbits.py``::

    python dev/generate_lanes.py           # rewrite both files
    python dev/generate_lanes.py --check   # exit 1 if either file is out of date

The DOP853 coefficients are read from scipy (``scipy.integrate._ivp.dop853_coefficients``), as
for ``swerve.orbits._dop853_step``.
"""

from __future__ import annotations

import ast
import inspect
import sys
import textwrap
from pathlib import Path

from scipy.integrate._ivp import dop853_coefficients as dc

from swerve.galaxy import kernels

OUT = Path(__file__).resolve().parents[1] / "src" / "swerve" / "orbit_lanes.py"
OUT_DISPATCH = Path(__file__).resolve().parents[1] / "src" / "swerve" / "galaxy" / "dispatch.py"

_BINOPS = {ast.Add: "add", ast.Sub: "sub", ast.Mult: "mul", ast.Div: "div"}
_CALLS = {"math.sqrt": "sqrt", "math.log1p": "log1p", "max": "maximum", "abs": "fabs"}


class Lanes:
    """Translates scalar statements into lane-vector code, tracking which names are vectors."""

    def __init__(self, vectors):
        self.vec = set(vectors)

    def expr(self, node):
        """(code, is_vector) of an expression node."""
        if isinstance(node, ast.Name):
            return node.id, node.id in self.vec
        if isinstance(node, ast.Constant):
            return repr(node.value), False
        if isinstance(node, ast.BinOp) and type(node.op) in _BINOPS:
            (a, va), (b, vb) = self.expr(node.left), self.expr(node.right)
            if not (va or vb):
                return f"({ast.unparse(node)})", False
            return f"S.{_BINOPS[type(node.op)]}({self.v(a, va)}, {self.v(b, vb)})", True
        if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub):
            a, va = self.expr(node.operand)
            if not va:
                return f"(-{a})", False
            return f"S.sub(S.splat(-0.0), {a})", True
        if isinstance(node, ast.Call):
            name = ast.unparse(node.func)
            args = [self.expr(x) for x in node.args]
            if name in _CALLS and any(v for _, v in args):
                return f"S.{_CALLS[name]}({', '.join(self.v(a, v) for a, v in args)})", True
            return ast.unparse(node), False
        if isinstance(node, ast.IfExp):
            t = node.test
            assert isinstance(t, ast.Compare) and isinstance(t.ops[0], ast.Lt), ast.unparse(t)
            parts = [self.expr(x) for x in (t.left, t.comparators[0], node.body, node.orelse)]
            if any(v for _, v in parts):
                return f"S.where_less({', '.join(self.v(a, v) for a, v in parts)})", True
            return f"({ast.unparse(node)})", False
        if isinstance(node, ast.Subscript):
            return ast.unparse(node), False
        raise ValueError(f"cannot translate {ast.unparse(node)}")

    @staticmethod
    def v(code, is_vec):
        return code if is_vec else f"S.splat({code})"

    def stmts(self, text, indent):
        out = []
        for st in ast.parse(text).body:
            if isinstance(st, ast.Assign):
                (target,) = st.targets
                code, isv = self.expr(st.value)
                name = ast.unparse(target)
                if isv:
                    self.vec.add(name)
                out.append(f"{indent}{name} = {code}")
            elif isinstance(st, ast.AugAssign):
                name = ast.unparse(st.target)
                assert name in self.vec, name
                code, isv = self.expr(st.value)
                out.append(f"{indent}{name} = S.{_BINOPS[type(st.op)]}({name}, {self.v(code, isv)})")
            else:
                raise ValueError(ast.unparse(st))
        return out


# --- the Galaxy force, from the table of component kinds -------------------------------------------
_XYZ = {"x": "X", "y": "Y", "z": "Z"}


class _Positions(ast.NodeTransformer):
    """Renames the position arguments x, y, z to the lane vectors X, Y, Z."""

    def visit_Name(self, node):
        return ast.copy_location(ast.Name(_XYZ.get(node.id, node.id), node.ctx), node)


def _lane_text(text: str) -> str:
    """Lane statements written with x, y, z, renamed to X, Y, Z."""
    return ast.unparse(_Positions().visit(ast.parse(text)))


def _is_zero_guard(st) -> str | None:
    """The guarded name of ``if v == 0.0: return 0.0, 0.0, 0.0``, else None."""
    if not (isinstance(st, ast.If) and not st.orelse and len(st.body) == 1):
        return None
    t, ret = st.test, st.body[0]
    if not (isinstance(t, ast.Compare) and isinstance(t.left, ast.Name) and len(t.ops) == 1
            and isinstance(t.ops[0], ast.Eq) and isinstance(t.comparators[0], ast.Constant)
            and t.comparators[0].value == 0.0):
        return None
    if not (isinstance(ret, ast.Return) and isinstance(ret.value, ast.Tuple)
            and all(isinstance(e, ast.Constant) and e.value == 0.0 for e in ret.value.elts)):
        return None
    return t.left.id


def translate_accel(fn) -> str:
    """Lane statements of a scalar force declaration ``fn(p, aux, x, y, z)`` (the rules are in
    ``swerve.galaxy.formulas``): assignments kept, a zero guard turned into a floor, the final
    ``return gx, gy, gz`` into ``ax += gx`` and so on."""
    py = getattr(fn, "py_func", fn)
    tree = ast.parse(textwrap.dedent(inspect.getsource(py)))
    (fdef,) = tree.body
    where = f"{py.__module__}.{py.__name__}"
    if [a.arg for a in fdef.args.args] != ["p", "aux", "x", "y", "z"]:
        raise ValueError(f"{where}: expected the arguments (p, aux, x, y, z)")
    body = list(fdef.body)
    if body and isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant):
        body = body[1:]  # the docstring
    out: list[ast.stmt] = []
    for i, st in enumerate(body):
        last = i == len(body) - 1
        guarded = _is_zero_guard(st)
        if guarded is not None:
            floor = ast.Name("_TINY2" if guarded.endswith("2") else "_TINY", ast.Load())
            prev = out[-1] if out else None
            if (isinstance(prev, ast.Assign) and len(prev.targets) == 1
                    and isinstance(prev.targets[0], ast.Name) and prev.targets[0].id == guarded):
                prev.value = ast.Call(ast.Name("max", ast.Load()), [prev.value, floor], [])
            else:
                out.append(ast.Assign([ast.Name(guarded, ast.Store())],
                                      ast.Call(ast.Name("max", ast.Load()),
                                               [ast.Name(guarded, ast.Load()), floor], []),
                                      lineno=0))
        elif isinstance(st, ast.Assign):
            for node in ast.walk(st.value):
                if isinstance(node, ast.Call) and ast.unparse(node.func) not in _CALLS:
                    raise ValueError(
                        f"{where}: cannot translate the call {ast.unparse(node)}; inline it or "
                        "give the kind's lane statements in its COMPONENT_KINDS entry")
            out.append(st)
        elif last and isinstance(st, ast.Return) and isinstance(st.value, ast.Tuple) \
                and len(st.value.elts) == 3:
            for acc, e in zip(("ax", "ay", "az"), st.value.elts):
                out.append(ast.AugAssign(ast.Name(acc, ast.Store()), ast.Add(), e))
        else:
            raise ValueError(f"{where}: cannot translate {ast.unparse(st)!r} (rules in "
                             "swerve.galaxy.formulas)")
    return _lane_text(ast.unparse(ast.Module(body=out, type_ignores=[])))


def gen_accel():
    L = ["@_jit", "def accel_lanes(kinds, pars, aux, X, Y, Z):",
         '    """Acceleration of a compiled Galaxy at eight points (lane vectors X, Y, Z); returns',
         "    (ax, ay, az) lane vectors.  Per lane the formulas of",
         "    :func:`swerve.galaxy.kernels.component_accel`; per-lane branches become selects and",
         '    the r = 0 guards become tiny floors (the force at the origin is still 0)."""',
         "    zero = S.splat(0.0)", "    ax = zero", "    ay = zero", "    az = zero",
         "    for i in range(kinds.shape[0]):", "        kind = kinds[i]", "        p = pars[i]"]
    base = {"X", "Y", "Z", "ax", "ay", "az", "zero"}
    for code, k in enumerate(kernels.COMPONENT_KINDS):
        L.append(f"        {'if' if code == 0 else 'elif'} kind == {k.name}:")
        if k.lanes is None:
            L += Lanes(base).stmts(translate_accel(k.accel), " " * 12)
        elif isinstance(k.lanes, str):
            L += Lanes(base).stmts(_lane_text(k.lanes), " " * 12)
        else:  # a node table in aux: spherical mode (p[2] == 0) and node-table mode
            lanes = {part: _lane_text(k.lanes[part]) for part in ("spherical", "head", "node", "tail")}
            L.append("            if p[2] == 0.0:")
            L += Lanes(base).stmts(lanes["spherical"], " " * 16)
            L.append("            else:")
            tr = Lanes(base)
            L += tr.stmts(lanes["head"], " " * 16)
            L += ["                off = int(p[7])", "                j = off + 1",
                  "                for _ in range(int(aux[off])):",
                  "                    c1 = aux[j]", "                    c2 = aux[j + 1]",
                  "                    c3 = aux[j + 2]", "                    wk = aux[j + 3]"]
            L += tr.stmts(lanes["node"], " " * 20)
            L.append("                    j += 4")
            L += tr.stmts(lanes["tail"], " " * 16)
    L += ["        else:", "            nan = S.splat(math.nan)", "            ax = nan",
          "            ay = nan", "            az = nan", "    return ax, ay, az"]
    return L


def comb(coefs, names):
    return " + ".join(f"{float(c)!r} * {n}" for c, n in zip(coefs, names) if c != 0.0)


def gen_step():
    A, B, E3, E5 = dc.A, dc.B, dc.E3, dc.E5
    L = ["@_jit",
         "def dop853_step_lanes(kinds, pars, aux, X, Y, Z, VX, VY, VZ, AX, AY, AZ, H, rtol, atol):",
         '    """One DOP853 step for eight orbits: :func:`swerve.orbits._dop853_step` per lane (same',
         "    coefficients, same error norm).  Arguments and results are lane vectors; returns",
         '    (x, y, z, vx, vy, vz, ax, ay, az, err) at t + h."""']
    tr = Lanes({"X", "Y", "Z", "VX", "VY", "VZ", "AX", "AY", "AZ", "H"})
    text = []
    vn = {0: ("VX", "VY", "VZ")}
    an = {0: ("AX", "AY", "AZ")}
    I = "    "
    for s in range(1, 12):
        for ci, c in enumerate("xyz"):
            C = c.upper()
            text.append(f"p{c} = {C} + H * ({comb(A[s, :s], [vn[j][ci] for j in range(s)])})")
            text.append(f"v{c}{s} = V{C} + H * ({comb(A[s, :s], [an[j][ci] for j in range(s)])})")
        L += tr.stmts("\n".join(text), I)
        text = []
        L.append(f"{I}ax{s}, ay{s}, az{s} = accel_lanes(kinds, pars, aux, px, py, pz)")
        tr.vec |= {f"ax{s}", f"ay{s}", f"az{s}"}
        vn[s] = (f"vx{s}", f"vy{s}", f"vz{s}")
        an[s] = (f"ax{s}", f"ay{s}", f"az{s}")
    for ci, c in enumerate("xyz"):
        C = c.upper()
        text.append(f"n{c} = {C} + H * ({comb(B, [vn[j][ci] for j in range(12)])})")
        text.append(f"nv{c} = V{C} + H * ({comb(B, [an[j][ci] for j in range(12)])})")
    L += tr.stmts("\n".join(text), I)
    L.append(f"{I}nax, nay, naz = accel_lanes(kinds, pars, aux, nx, ny, nz)")
    text = []
    for name, E in (("e5", E5), ("e3", E3)):
        for ci, c in enumerate("xyz"):
            text.append(f"{name}x{c} = {comb(E[:12], [vn[j][ci] for j in range(12)])}")
            text.append(f"{name}v{c} = {comb(E[:12], [an[j][ci] for j in range(12)])}")
    text += ["r0 = math.sqrt(X * X + Y * Y + Z * Z)",
             "r1 = math.sqrt(nx * nx + ny * ny + nz * nz)",
             "w0 = math.sqrt(VX * VX + VY * VY + VZ * VZ)",
             "w1 = math.sqrt(nvx * nvx + nvy * nvy + nvz * nvz)",
             "sx = atol + rtol * max(r0, r1)",
             "sv = atol + rtol * max(w0, w1)",
             "ix = 1.0 / (sx * sx)",
             "iv = 1.0 / (sv * sv)",
             "e5 = (e5xx * e5xx + e5xy * e5xy + e5xz * e5xz) * ix + (e5vx * e5vx + e5vy * e5vy + e5vz * e5vz) * iv",
             "e3 = (e3xx * e3xx + e3xy * e3xy + e3xz * e3xz) * ix + (e3vx * e3vx + e3vy * e3vy + e3vz * e3vz) * iv",
             "err = abs(H) * e5 / math.sqrt(2.0 * max(e5 + 0.01 * e3, _TINY2))"]
    L += tr.stmts("\n".join(text), I)
    L.append(f"{I}return nx, ny, nz, nvx, nvy, nvz, nax, nay, naz, err")
    return L


HEADER = '''"""Lane kernels of the orbit engine: the Galaxy force and one DOP853 step for eight orbits at
once, in explicit SIMD (:mod:`swerve.simd`).  GENERATED by ``dev/generate_lanes.py`` from the
formula declarations of the component kinds (:data:`swerve.galaxy.kernels.COMPONENT_KINDS`) and
the stepper's statements written there; edit those, not this file.

Per lane the formulas are those of :mod:`swerve.galaxy.formulas`, :mod:`swerve.galaxy.expansion`
and :func:`swerve.orbits._dop853_step`.  Per-lane branches are selects (both sides computed), so
lanes never diverge inside a step, and the r = 0 guards are tiny floors (the force at the origin
is still 0; the step's error norm floors its denominator the same way; a zero error stays 0).
"""

import math

import numba as nb

from . import simd as S
from .galaxy.dispatch import (
{kinds}
)

_TINY = 1e-100
_TINY2 = 1e-200

_jit = nb.njit(cache=True, error_model="numpy", fastmath={{"contract"}})


'''


def _kind_names() -> str:
    return "\n".join(f"    {k.name}," for k in sorted(kernels.COMPONENT_KINDS, key=lambda k: k.name))


def render() -> str:
    """The text of ``src/swerve/orbit_lanes.py``."""
    return (HEADER.format(kinds=_kind_names()) + "\n".join(gen_accel()) + "\n\n\n"
            + "\n".join(gen_step()) + "\n")


def render_dispatch() -> str:
    """The text of ``src/swerve/galaxy/dispatch.py``: kind codes and the scalar dispatch."""
    imports: dict[str, list[str]] = {}
    for k in kernels.COMPONENT_KINDS:
        for fn in (k.accel, k.potential):
            py = getattr(fn, "py_func", fn)
            module = py.__module__
            if module.startswith("swerve.galaxy."):
                module = "." + module[len("swerve.galaxy."):]
            imports.setdefault(module, []).append(py.__name__)
    # absolute imports first, then relative ones, each sorted
    order = sorted(imports, key=lambda m: (m.startswith("."), m))
    lines = ['"""Dispatch of the Galaxy\'s scalar force kernels over the component kinds.  GENERATED by',
             "``dev/generate_lanes.py`` from :data:`swerve.galaxy.kernels.COMPONENT_KINDS`; edit that",
             'table and the functions it names, not this file."""', "", "import math", "",
             "import numba as nb", ""]
    for m in order:
        one = f"from {m} import {', '.join(sorted(imports[m]))}"
        if len(one) <= 100:
            lines.append(one)
        else:
            lines += [f"from {m} import ("] + [f"    {n}," for n in sorted(imports[m])] + [")"]
    lines.append("")
    for code, k in enumerate(kernels.COMPONENT_KINDS):
        lines += [f"#: pars row: {k.pars}", f"{k.name} = {code}"]
    lines += ["", '_jit = nb.njit(cache=True, fastmath=False, inline="always")', "", ""]
    for what, ret, nan in (("accel", "Acceleration (ax, ay, az)", "math.nan, math.nan, math.nan"),
                           ("potential", "Potential", "math.nan")):
        lines += ["@_jit", f"def component_{what}(kind, p, aux, x, y, z):",
                  f'    """{ret} of one component of kind ``kind`` at (x, y, z)."""']
        for code, k in enumerate(kernels.COMPONENT_KINDS):
            fn = getattr(k, what)
            name = getattr(fn, "py_func", fn).__name__
            lines += [f"    {'if' if code == 0 else 'elif'} kind == {k.name}:",
                      f"        return {name}(p, aux, x, y, z)"]
        lines += [f"    return {nan}", "", ""]
    return "\n".join(lines[:-2]) + "\n"


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    outputs = ((OUT_DISPATCH, render_dispatch()), (OUT, render()))
    if argv == ["--check"]:
        stale = [path for path, text in outputs if path.read_text() != text]
        for path in stale:
            print(f"{path} is out of date: run python dev/generate_lanes.py")
        return 1 if stale else 0
    if argv:
        print("usage: python dev/generate_lanes.py [--check]")
        return 2
    for path, text in outputs:
        path.write_text(text)
        print(f"wrote {path} ({len(text.splitlines())} lines)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
