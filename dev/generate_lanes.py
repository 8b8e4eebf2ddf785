"""Write ``src/swerve/orbit_lanes.py``: the Galaxy force and one DOP853 step for eight orbits
at once, in explicit SIMD (:mod:`swerve.simd`).

The formulas are written below once, as ordinary scalar Python statements (the same as in
``swerve.galaxy.kernels``, ``swerve.galaxy.expansion`` and ``swerve.orbits._dop853_step``); this
script translates each statement into lane-vector operations (``a * b`` becomes
``S.mul(a, b)``, ``x if u < c else y`` becomes ``S.where_less(u, c, x, y)``, scalars are
broadcast with ``S.splat``).  Run from the repository root after changing a force formula or
the stepper, then run ``tests/test_orbits.py``::

    python dev/generate_lanes.py           # rewrite the file
    python dev/generate_lanes.py --check   # exit 1 if the file is out of date

The DOP853 coefficients are read from scipy (``scipy.integrate._ivp.dop853_coefficients``), as
for ``swerve.orbits._dop853_step``.
"""

from __future__ import annotations

import ast
import sys
from pathlib import Path

from scipy.integrate._ivp import dop853_coefficients as dc

OUT = Path(__file__).resolve().parents[1] / "src" / "swerve" / "orbit_lanes.py"

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


# --- the Galaxy force, per component kind (pars row p, positions X, Y, Z) ------------------
_NFW_SERIES = "(0.5 + u * (-2.0 / 3.0 + u * (0.75 + u * (-0.8 + u * (5.0 / 6.0 + u * (-6.0 / 7.0))))))"


def _nfw_g(m, rs):
    """-(1/m) dPhi/dm / (G M) of the NFW potential at radius ``m`` (u = m / rs), with the series
    below u = 1e-3 (swerve.galaxy.kernels._nfw_dphi_dm_over_m)."""
    return (f"({_NFW_SERIES} / ({rs} * {rs} * {m}) if u < 1e-3 "
            f"else (math.log1p(u) / ({m} * {m}) - 1.0 / ({m} * ({rs} + {m}))) / {m})")


FORCE = {
    "KIND_POINT_MASS": """
r2 = max(X * X + Y * Y + Z * Z, _TINY2)
f = -p[0] / (r2 * math.sqrt(r2))
ax += f * X
ay += f * Y
az += f * Z
""",
    "KIND_HERNQUIST": """
r = max(math.sqrt(X * X + Y * Y + Z * Z), _TINY)
s = r + p[1]
f = -p[0] / (s * s * r)
ax += f * X
ay += f * Y
az += f * Z
""",
    "KIND_MIYAMOTO_NAGAI": """
zeta = math.sqrt(Z * Z + p[2] * p[2])
q = p[1] + zeta
d2 = X * X + Y * Y + q * q
f = -p[0] / (d2 * math.sqrt(d2))
ax += f * X
ay += f * Y
az += f * Z * q / zeta
""",
    "KIND_NFW_POTENTIAL_FLAT": f"""
m = max(math.sqrt(X * X + Y * Y * p[2] + Z * Z * p[3]), _TINY)
u = m / p[1]
g = -p[0] * {_nfw_g("m", "p[1]")}
ax += g * X
ay += g * Y * p[2]
az += g * Z * p[3]
""",
}
# density-flattened halo: spherical mode (p[2] == 0) and node-table mode
NFW_DENSITY_SPHERICAL = f"""
r = max(math.sqrt(X * X + Y * Y + Z * Z), _TINY)
u = r / p[1]
g = -p[0] * {_nfw_g("r", "p[1]")}
ax += g * X
ay += g * Y
az += g * Z
"""
NFW_DENSITY_HEAD = f"""
r = max(math.sqrt(X * X + Y * Y + Z * Z), _TINY)
u = r / p[3]
b = 1.0 / (1.0 + u)
g = -p[0] * {_nfw_g("r", "p[3]")} - 2.0 * p[0] * p[5] / (p[3] * p[3]) * b * b * b / r
x2 = X * X * (p[4] * p[4])
y2 = Y * Y * (p[4] * p[4])
z2 = Z * Z * (p[4] * p[4])
sx = 0.0 * X
sy = 0.0 * X
sz = 0.0 * X
"""
NFW_DENSITY_NODE = """
v = max(math.sqrt(x2 * c1 + y2 * c2 + z2 * c3), _TINY)
t = v + 1.0
f = wk / (v * t * t)
sx += f * c1
sy += f * c2
sz += f * c3
"""
NFW_DENSITY_TAIL = """
k = -p[0] * p[4] * (p[4] * p[4])
ax += (g + k * sx) * X
ay += (g + k * sy) * Y
az += (g + k * sz) * Z
"""


def gen_accel():
    L = ["@_jit", "def accel_lanes(kinds, pars, aux, X, Y, Z):",
         '    """Acceleration of a compiled Galaxy at eight points (lane vectors X, Y, Z); returns',
         "    (ax, ay, az) lane vectors.  Per lane the formulas of",
         "    :func:`swerve.galaxy.kernels.component_accel`; per-lane branches become selects and",
         '    the r = 0 guards become tiny floors (the force at the origin is still 0)."""',
         "    zero = S.splat(0.0)", "    ax = zero", "    ay = zero", "    az = zero",
         "    for i in range(kinds.shape[0]):", "        kind = kinds[i]", "        p = pars[i]"]
    base = {"X", "Y", "Z", "ax", "ay", "az", "zero"}
    first = True
    for kind, text in FORCE.items():
        L.append(f"        {'if' if first else 'elif'} kind == {kind}:")
        first = False
        L += Lanes(base).stmts(text, " " * 12)
    L.append("        elif kind == KIND_NFW_DENSITY_FLAT:")
    L.append("            if p[2] == 0.0:")
    L += Lanes(base).stmts(NFW_DENSITY_SPHERICAL, " " * 16)
    L.append("            else:")
    tr = Lanes(base)
    L += tr.stmts(NFW_DENSITY_HEAD, " " * 16)
    L += ["                off = int(p[7])", "                j = off + 1",
          "                for _ in range(int(aux[off])):",
          "                    c1 = aux[j]", "                    c2 = aux[j + 1]",
          "                    c3 = aux[j + 2]", "                    wk = aux[j + 3]"]
    L += tr.stmts(NFW_DENSITY_NODE, " " * 20)
    L.append("                    j += 4")
    L += tr.stmts(NFW_DENSITY_TAIL, " " * 16)
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
once, in explicit SIMD (:mod:`swerve.simd`).  GENERATED by ``dev/generate_lanes.py`` from
scalar statements written there; edit that script, not this file.

Per lane the formulas are those of :mod:`swerve.galaxy.kernels`, :mod:`swerve.galaxy.expansion`
and :func:`swerve.orbits._dop853_step`.  Per-lane branches are selects (both sides computed), so
lanes never diverge inside a step, and the r = 0 guards are tiny floors (the force at the origin
is still 0; the step's error norm floors its denominator the same way; a zero error stays 0).
"""

import math

import numba as nb

from . import simd as S
from .galaxy.kernels import (
    KIND_HERNQUIST,
    KIND_MIYAMOTO_NAGAI,
    KIND_NFW_DENSITY_FLAT,
    KIND_NFW_POTENTIAL_FLAT,
    KIND_POINT_MASS,
)

_TINY = 1e-100
_TINY2 = 1e-200

_jit = nb.njit(cache=True, error_model="numpy", fastmath={"contract"})


'''


def render() -> str:
    """The text of ``src/swerve/orbit_lanes.py``."""
    return HEADER + "\n".join(gen_accel()) + "\n\n\n" + "\n".join(gen_step()) + "\n"


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    text = render()
    if argv == ["--check"]:
        if OUT.read_text() != text:
            print(f"{OUT} is out of date: run python dev/generate_lanes.py")
            return 1
        return 0
    OUT.write_text(text)
    print(f"wrote {OUT} ({len(text.splitlines())} lines)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
