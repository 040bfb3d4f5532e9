"""C99 source of a scheduled discrete controller: a header and a .c file.

The generated code uses only const arrays, a clamped multilinear lookup written
operation for operation like :mod:`schedule.export.runtime`, the actuator limiter with
the observer-form anti-windup (:mod:`schedule.export.antiwindup`), an init, a bumpless
init and a step function, no dynamic memory, no library calls and no global mutable
state: the controller state lives in a struct owned by the caller. Every public name
starts with the chosen prefix (functions and types in lower case, macros in upper case).
See docs/tables.md.

Text from the table (signal names, units, provenance) reaches the C only inside
comments and string literals, through :func:`c_comment` and :func:`c_string`, which
keep a small set of printable ASCII characters and spell everything else out, so no
character sequence (comment ends, backslash-newline, trigraphs such as ``??/``, control
characters, carriage returns) can change the meaning of the code. Identifiers are only
the validated prefix and fixed names.
"""

from __future__ import annotations

import os
import re
import string
from pathlib import Path

import numpy as np

from ..atomic import write_dir_atomic
from ..errors import InputError
from ..table_files import DEFAULT_PREFIX
from .table import ScheduledTable

_IDENT = re.compile(r"[A-Za-z][A-Za-z0-9_]{0,30}")
_C_KEYWORDS = {"auto", "break", "case", "char", "const", "continue", "default", "do", "double",
               "else", "enum", "extern", "float", "for", "goto", "if", "inline", "int", "long",
               "register", "restrict", "return", "short", "signed", "sizeof", "static",
               "struct", "switch", "typedef", "union", "unsigned", "void", "volatile", "while",
               "_Bool", "_Complex", "_Imaginary"}
# Characters copied as they are. Not in the sets: backslash (line splicing, escapes),
# '?' (trigraphs such as ??/ = backslash under -std=c99), quotes, every control character
# (CR, LF, TAB, NUL...) and everything outside ASCII.
_PLAIN = frozenset(string.ascii_letters + string.digits + " _.,:;+-=()[]{}<>!#$%&|~^@/*'")
_PLAIN_STRING = _PLAIN - {"'"}


def check_prefix(prefix: str) -> str:
    """Validate a C name prefix (letter first, then letters, digits, underscores)."""
    if not isinstance(prefix, str) or not _IDENT.fullmatch(prefix) or prefix in _C_KEYWORDS:
        raise InputError(f"C prefix {prefix!r} is not a valid C identifier start; use letters, "
                         "digits and underscores, a letter first, at most 31 characters")
    return prefix


def c_comment(text: str) -> str:
    """``text`` made safe inside a ``/* ... */`` comment.

    Characters outside a plain printable ASCII set become ``<U+XXXX>``; ``*/`` (which
    would end the comment) and ``/*`` (which -Wcomment flags) are split by a space.
    """
    out = "".join(ch if ch in _PLAIN else f"<U+{ord(ch):04X}>" for ch in str(text))
    while "*/" in out or "/*" in out:
        out = out.replace("*/", "* /").replace("/*", "/ *")
    return out


def c_string(text: str) -> str:
    """``text`` as a C string literal of its UTF-8 bytes.

    Plain printable ASCII characters are copied; every other byte is written as a
    three-digit octal escape (``\\ooo`` takes at most three digits, so a following digit
    cannot join it, unlike ``\\x``).
    """
    data = str(text).encode("utf-8", "surrogatepass")
    body = "".join(chr(b) if chr(b) in _PLAIN_STRING else f"\\{b:03o}" for b in data)
    return f'"{body}"'


def _num(x: float) -> str:
    return repr(float(x))


def _array(values, per_line: int = 4) -> str:
    vals = [_num(v) for v in np.asarray(values, dtype=float).ravel()] or ["0.0"]
    lines = [", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line)]
    return "{\n    " + ",\n    ".join(lines) + "\n}"


def _limit_array(values, none: str) -> str:
    return "{" + ", ".join(_num(v) if np.isfinite(v) else none for v in values) + "}"


def _unit_texts(units, names) -> list[str]:
    """`` [unit]`` per signal for the header comments ("" where the unit is unknown)."""
    units = tuple(units) if len(tuple(units)) == len(names) else ("",) * len(names)
    return [f" [{c_comment(u)}]" if u else "" for u in units]


def c_source_text(table: ScheduledTable, prefix: str = DEFAULT_PREFIX) -> tuple[str, str]:
    """Return ``(header_text, source_text)`` for ``table`` with name prefix ``prefix``."""
    p = check_prefix(prefix)
    P = p.upper()
    if not table.discrete:
        raise InputError("C export needs a discrete table; give --sample-time (and --method)")
    d, n, ny, nu = len(table.variables), table.n_states, table.n_inputs, table.n_outputs
    aw = table.H is not None
    shape = table.shape
    M = int(np.prod(shape))
    sizes = {"A": n * n, "B": n * ny, "C": nu * n, "D": nu * ny, "H": n * nu if aw else 0}
    var_doc = "\n".join(f" *   p[{k}] = {c_comment(v.name)} [{c_comment(v.unit)}], "
                        f"{len(b)} breakpoints from {b[0]:g} to {b[-1]:g}"
                        for k, (v, b) in enumerate(zip(table.variables, table.breakpoints,
                                                       strict=True)))
    y_units = _unit_texts(table.measured_units, table.measured_names)
    u_units = _unit_texts(table.control_units, table.control_names)
    in_doc = "\n".join(f" *   y[{i}] = {c_comment(s)}{y_units[i]}"
                        for i, s in enumerate(table.measured_names))
    lim = table.actuator_limits
    u_plain = [f" {unit[2:-1]}" if unit else "" for unit in u_units]
    out_doc = "\n".join(
        f" *   u[{i}] = {c_comment(s)}{u_units[i]}" + (
            f" (limits {lim.lower[i]:g} .. {lim.upper[i]:g}{u_plain[i]}, rate "
            + (f"{lim.rate[i]:g}{u_plain[i]} per s)" if np.isfinite(lim.rate[i]) else "none)")
            if np.isfinite([lim.lower[i], lim.upper[i], lim.rate[i]]).any() else "")
        for i, s in enumerate(table.control_names))
    guard = f"{P}_TABLE_H"
    warp = f" (pre-warp {_num(table.prewarp)} rad/s)" if table.prewarp else ""
    version = c_comment(table.tool_version)
    source = c_comment(table.source_sha256 or "(in memory)")
    header = f"""/* {p}_table.h: scheduled discrete controller (generated by schedule {version}).
 *
 *   u     = C(p) x[k] + D(p) y[k]
 *   u_lim = u limited in rate, then in magnitude (limits in {p}_state)
 *   x[k+1] = A(p) x[k] + B(p) y[k] + H(p) (u_lim - u)     (anti-windup)
 *
 * A(p)..H(p): multilinear interpolation of the table over the scheduling point p,
 * clamped to the breakpoint range. Sample time {_num(table.sample_time)} s, method
 * {table.method}{warp}, gamma {table.gamma:.6g}.
 * Source family SHA-256: {source}.
 *
 * Scheduling variables:
{var_doc}
 * Controller inputs (deviations from trim / reference):
{in_doc}
 * Controller outputs (deviations from the trim controls):
{out_doc}
 *
 * No dynamic memory, no library calls, no global mutable state: keep one {p}_state
 * per controller.
 */
#ifndef {guard}
#define {guard}

#define {P}_N_VARIABLES {d}
#define {P}_N_STATES {n}
#define {P}_N_INPUTS {ny}
#define {P}_N_OUTPUTS {nu}
#define {P}_SAMPLE_TIME {_num(table.sample_time)}
/* 1 when the table carries the anti-windup gain H (and {p}_init_steady works). */
#define {P}_ANTI_WINDUP {int(aw)}

/* Return codes of {p}_step and {p}_init_steady; on an error the state is unchanged. */
#define {P}_OK 0
#define {P}_BAD_INPUT 1
#define {P}_BAD_SCHEDULE 2
#define {P}_BAD_COMMAND 3
#define {P}_SINGULAR 4

/* Controller state, owned by the caller. {p}_init sets every field; the limits
   (defaults from the table, +-DBL_MAX = none) and anti_windup may be changed
   between samples: lower <= 0 <= upper, rate > 0 (per second). */
typedef struct {{
    double x[{max(n, 1)}];      /* controller state */
    double u_last[{nu}];   /* last command sent (after the limits) */
    double lower[{nu}];    /* magnitude limits of the command */
    double upper[{nu}];
    double rate[{nu}];     /* rate limits, per second */
    int anti_windup;      /* 1: feed the state the limited command (default when available) */
}} {p}_state;

/* Set the state to x0 ({P}_N_STATES values), or to zero when x0 is NULL; the last
   command to zero (the trim); the limits to the table's. */
void {p}_init({p}_state *s, const double *x0);

/* Bumpless start: {p}_init, then the state for switching in while the measurements
   y0 and the command u0 are held at scheduling point p, so that the next command is
   u0 (no jump). Returns {P}_OK, {P}_BAD_INPUT (y0), {P}_BAD_COMMAND (u0),
   {P}_BAD_SCHEDULE (p) or {P}_SINGULAR (no such state, or no anti-windup gain). */
int {p}_init_steady({p}_state *s, const double *y0, const double *u0, const double *p);

/* One sample: writes the limited command u ({P}_N_OUTPUTS values) and updates the
   state. y: {P}_N_INPUTS values, p: {P}_N_VARIABLES values. The state is kept across
   changes of p. Returns {P}_OK, or {P}_BAD_INPUT (a y is NaN or infinite) or
   {P}_BAD_SCHEDULE (a p is NaN or infinite); then nothing is written or changed. */
int {p}_step({p}_state *s, const double *y, const double *p, double *u);

/* The interpolated matrices at p, row-major (A: N_STATES x N_STATES, B: N_STATES x
   N_INPUTS, C: N_OUTPUTS x N_STATES, D: N_OUTPUTS x N_INPUTS). Any argument may be
   NULL (that matrix is skipped). A NaN in p counts as the first breakpoint. */
void {p}_lookup(const double *p, double *A, double *B, double *C, double *D);

/* The interpolated anti-windup gain H at p (N_STATES x N_OUTPUTS, row-major; zero when
   {P}_ANTI_WINDUP is 0). H may be NULL. */
void {p}_lookup_gain(const double *p, double *H);

extern const char *const {p}_variable_names[{P}_N_VARIABLES];
extern const char *const {p}_input_names[{max(ny, 1)}];
extern const char *const {p}_output_names[{max(nu, 1)}];

#endif /* {guard} */
"""
    parts = [f"/* {p}_table.c: generated by schedule {version}; do not edit. */",
             f'#include "{p}_table.h"', "", "#include <float.h>", "#include <stddef.h>", ""]
    names_v = ", ".join(c_string(v.name) for v in table.variables)
    names_i = ", ".join(c_string(s) for s in table.measured_names) or '""'
    names_o = ", ".join(c_string(s) for s in table.control_names) or '""'
    parts += [f"const char *const {p}_variable_names[{P}_N_VARIABLES] = {{{names_v}}};",
              f"const char *const {p}_input_names[{max(ny, 1)}] = {{{names_i}}};",
              f"const char *const {p}_output_names[{max(nu, 1)}] = {{{names_o}}};", ""]
    for k, b in enumerate(table.breakpoints):
        parts.append(f"static const double {p}_bp{k}[{len(b)}] = {_array(b)};")
    parts.append(f"static const double *const {p}_bp[{d}] = "
                 f"{{{', '.join(f'{p}_bp{k}' for k in range(d))}}};")
    parts.append(f"static const long {p}_bp_count[{d}] = {{{', '.join(str(s) for s in shape)}}};")
    parts.append("")
    for key in "ABCDH":
        if sizes[key]:
            what = "anti-windup gain H" if key == "H" else key
            parts.append(f"/* {what} at the {M} nodes, row-major, first variable slowest */")
            parts.append(f"static const double {p}_tab_{key}[{M * sizes[key]}] = "
                         f"{_array(getattr(table, key).reshape(M, -1))};")
    parts += [f"static const double {p}_lower0[{nu}] = {_limit_array(lim.lower, '-DBL_MAX')};",
              f"static const double {p}_upper0[{nu}] = {_limit_array(lim.upper, 'DBL_MAX')};",
              f"static const double {p}_rate0[{nu}] = {_limit_array(lim.rate, 'DBL_MAX')};", ""]
    parts.append(_helpers(p))
    parts.append(_interp(p, d, sizes))
    parts.append(_step(p, P, n, ny, nu, d, sizes, aw))
    parts.append(_init(p, P, n, ny, nu, d, sizes, aw))
    return header, "\n".join(parts)


def _helpers(p: str) -> str:
    return f"""/* finite: false for NaN and +-inf (no math library needed) */
static int {p}_finite(double v)
{{
    return v - v == 0.0;
}}

static int {p}_all_finite(const double *v, long count)
{{
    long i;
    for (i = 0; i < count; ++i)
        if (!{p}_finite(v[i])) return 0;
    return 1;
}}
"""


def _interp(p: str, d: int, sizes: dict) -> str:
    acc, zero = [], []
    for key in "ABCDH":
        if sizes[key]:
            zero.append(f"    if ({key} != NULL) for (e = 0; e < {sizes[key]}; ++e) "
                        f"{key}[e] = 0.0;")
            acc.append(f"        if ({key} != NULL) for (e = 0; e < {sizes[key]}; ++e) "
                       f"{key}[e] += w * {p}_tab_{key}[f * {sizes[key]} + e];")
        else:
            zero.append(f"    (void){key};")
    return f"""/* Clamped multilinear interpolation of every non-NULL matrix at p. */
static void {p}_interp(const double *p, double *A, double *B, double *C, double *D,
                       double *H)
{{
    long idx[{d}];
    double t[{d}];
    long k, c, e;
    for (k = 0; k < {d}; ++k) {{
        const double *b = {p}_bp[k];
        const long n = {p}_bp_count[k];
        double q = p[k];
        if (!(q >= b[0])) q = b[0];
        if (!(q <= b[n - 1])) q = b[n - 1];
        if (n == 1) {{
            idx[k] = 0;
            t[k] = 0.0;
        }} else {{
            long a = 0, z = n - 2;
            while (a < z) {{
                const long mid = (a + z + 1) / 2;
                if (b[mid] <= q) a = mid; else z = mid - 1;
            }}
            idx[k] = a;
            t[k] = (q - b[a]) / (b[a + 1] - b[a]);
        }}
    }}
{chr(10).join(zero)}
    for (c = 0; c < (1L << {d}); ++c) {{
        double w = 1.0;
        long f = 0;
        for (k = 0; k < {d}; ++k) {{
            const long bit = (c >> k) & 1L;
            long j = idx[k] + bit;
            if (j > {p}_bp_count[k] - 1) j = {p}_bp_count[k] - 1;
            f = f * {p}_bp_count[k] + j;
            w = w * (bit ? t[k] : 1.0 - t[k]);
        }}
{chr(10).join(acc) if acc else "        (void)f; (void)w; (void)e;"}
    }}
}}

void {p}_lookup(const double *p, double *A, double *B, double *C, double *D)
{{
    {p}_interp(p, A, B, C, D, NULL);
}}

void {p}_lookup_gain(const double *p, double *H)
{{
    {p}_interp(p, NULL, NULL, NULL, NULL, H);
}}
"""


def _buffers(sizes: dict, n: int, nu: int) -> str:
    return (f"    double A[{max(sizes['A'], 1)}], B[{max(sizes['B'], 1)}], "
            f"C[{max(sizes['C'], 1)}], D[{max(sizes['D'], 1)}], H[{max(sizes['H'], 1)}];\n")


def _step(p: str, P: str, n: int, ny: int, nu: int, d: int, sizes: dict, aw: bool) -> str:
    h_arg = "H" if aw and sizes["H"] else "NULL"
    aw_term = (f"        if (s->anti_windup && limited)\n"
               f"            for (j = 0; j < {nu}; ++j) acc += H[i * {nu} + j] * du[j];\n"
               if aw and sizes["H"] else "")
    return f"""int {p}_step({p}_state *s, const double *y, const double *p, double *u)
{{
{_buffers(sizes, n, nu)}    double un[{nu}], du[{nu}], ul[{nu}], xn[{max(n, 1)}];
    long i, j;
    int limited = 0;
    if (!{p}_all_finite(y, {ny})) return {P}_BAD_INPUT;
    if (!{p}_all_finite(p, {d})) return {P}_BAD_SCHEDULE;
    (void)H;
    {p}_interp(p, A, B, C, D, {h_arg});
    for (i = 0; i < {nu}; ++i) {{
        double acc = 0.0;
        for (j = 0; j < {n}; ++j) acc += C[i * {max(n, 1)} + j] * s->x[j];
        for (j = 0; j < {ny}; ++j) acc += D[i * {max(ny, 1)} + j] * y[j];
        un[i] = acc;
    }}
    for (i = 0; i < {nu}; ++i) {{
        const double step = s->rate[i] * {P}_SAMPLE_TIME;
        const double lo = s->u_last[i] - step, hi = s->u_last[i] + step;
        double v = un[i];
        if (v < lo) v = lo;
        if (v > hi) v = hi;
        if (v < s->lower[i]) v = s->lower[i];
        if (v > s->upper[i]) v = s->upper[i];
        ul[i] = v;
        du[i] = v - un[i];
        if (v != un[i]) limited = 1;
    }}
    for (i = 0; i < {n}; ++i) {{
        double acc = 0.0;
        for (j = 0; j < {n}; ++j) acc += A[i * {max(n, 1)} + j] * s->x[j];
        for (j = 0; j < {ny}; ++j) acc += B[i * {max(ny, 1)} + j] * y[j];
{aw_term}        xn[i] = acc;
    }}
    for (i = 0; i < {n}; ++i) s->x[i] = xn[i];
    for (i = 0; i < {nu}; ++i) {{
        s->u_last[i] = ul[i];
        u[i] = ul[i];
    }}
    (void)du;
    (void)limited;
    (void)xn;
    return {P}_OK;
}}
"""


def _init(p: str, P: str, n: int, ny: int, nu: int, d: int, sizes: dict, aw: bool) -> str:
    init = f"""void {p}_init({p}_state *s, const double *x0)
{{
    long i;
    for (i = 0; i < {max(n, 1)}; ++i) s->x[i] = (x0 != NULL && i < {n}) ? x0[i] : 0.0;
    for (i = 0; i < {nu}; ++i) {{
        s->u_last[i] = 0.0;
        s->lower[i] = {p}_lower0[i];
        s->upper[i] = {p}_upper0[i];
        s->rate[i] = {p}_rate0[i];
    }}
    s->anti_windup = {P}_ANTI_WINDUP;
}}
"""
    head = (f"int {p}_init_steady({p}_state *s, const double *y0, const double *u0, "
            "const double *p)\n{")
    checks = f"""    if (!{p}_all_finite(y0, {ny})) return {P}_BAD_INPUT;
    if (!{p}_all_finite(u0, {nu})) return {P}_BAD_COMMAND;
    if (!{p}_all_finite(p, {d})) return {P}_BAD_SCHEDULE;"""
    if not (aw and n):
        body = f"""{head}
{checks}
    (void)s;
    return {P}_SINGULAR;
}}
"""
        return init + "\n" + body
    solve = f"""/* Solve M z = b in place (m x m, row-major; Gaussian elimination with partial
   pivoting). Returns 0, or 1 when a pivot is below 1e-13 times the largest entry. */
static int {p}_solve(long m, double *M, double *b)
{{
    long i, j, k;
    double scale = 0.0;
    for (i = 0; i < m * m; ++i) {{
        const double a = M[i] < 0.0 ? -M[i] : M[i];
        if (a > scale) scale = a;
    }}
    if (!(scale > 0.0)) return 1;
    for (k = 0; k < m; ++k) {{
        long piv = k;
        double big = M[k * m + k] < 0.0 ? -M[k * m + k] : M[k * m + k];
        for (i = k + 1; i < m; ++i) {{
            const double a = M[i * m + k] < 0.0 ? -M[i * m + k] : M[i * m + k];
            if (a > big) {{
                big = a;
                piv = i;
            }}
        }}
        if (!(big > 1e-13 * scale)) return 1;
        if (piv != k) {{
            double tmp;
            for (j = 0; j < m; ++j) {{
                tmp = M[k * m + j];
                M[k * m + j] = M[piv * m + j];
                M[piv * m + j] = tmp;
            }}
            tmp = b[k];
            b[k] = b[piv];
            b[piv] = tmp;
        }}
        for (i = k + 1; i < m; ++i) {{
            const double f = M[i * m + k] / M[k * m + k];
            for (j = k; j < m; ++j) M[i * m + j] -= f * M[k * m + j];
            b[i] -= f * b[k];
        }}
    }}
    for (k = m - 1; k >= 0; --k) {{
        double acc = b[k];
        for (j = k + 1; j < m; ++j) acc -= M[k * m + j] * b[j];
        b[k] = acc / M[k * m + k];
    }}
    return 0;
}}
"""
    body = f"""{head}
{_buffers(sizes, n, nu)}    double S[{n * n}], xs[{n}], G[{nu * nu}], z[{nu}];
    long i, j, k;
{checks}
    {p}_interp(p, A, B, C, D, H);
    /* x_s solves (I - A + H C) x_s = (B - H D) y0 + H u0 */
    for (i = 0; i < {n}; ++i) {{
        double acc = 0.0;
        for (j = 0; j < {n}; ++j) {{
            double hc = 0.0;
            for (k = 0; k < {nu}; ++k) hc += H[i * {nu} + k] * C[k * {n} + j];
            S[i * {n} + j] = (i == j ? 1.0 : 0.0) - A[i * {n} + j] + hc;
        }}
        for (j = 0; j < {ny}; ++j) {{
            double hd = 0.0;
            for (k = 0; k < {nu}; ++k) hd += H[i * {nu} + k] * D[k * {ny} + j];
            acc += (B[i * {ny} + j] - hd) * y0[j];
        }}
        for (k = 0; k < {nu}; ++k) acc += H[i * {nu} + k] * u0[k];
        xs[i] = acc;
    }}
    if ({p}_solve({n}, S, xs)) return {P}_SINGULAR;
    /* x0 = x_s + H (C H)^-1 (u0 - C x_s - D y0) */
    for (i = 0; i < {nu}; ++i) {{
        double acc = u0[i];
        for (j = 0; j < {n}; ++j) acc -= C[i * {n} + j] * xs[j];
        for (j = 0; j < {ny}; ++j) acc -= D[i * {ny} + j] * y0[j];
        z[i] = acc;
        for (j = 0; j < {nu}; ++j) {{
            double ch = 0.0;
            for (k = 0; k < {n}; ++k) ch += C[i * {n} + k] * H[k * {nu} + j];
            G[i * {nu} + j] = ch;
        }}
    }}
    if ({p}_solve({nu}, G, z)) return {P}_SINGULAR;
    {p}_init(s, NULL);
    for (i = 0; i < {n}; ++i) {{
        double acc = xs[i];
        for (j = 0; j < {nu}; ++j) acc += H[i * {nu} + j] * z[j];
        s->x[i] = acc;
    }}
    for (i = 0; i < {nu}; ++i) s->u_last[i] = u0[i];
    return {P}_OK;
}}
"""
    return init + "\n" + solve + "\n" + body


def write_c_source(out_dir: str | os.PathLike, table: ScheduledTable,
                   prefix: str = DEFAULT_PREFIX) -> list[Path]:
    """Write ``<prefix>_table.h`` and ``<prefix>_table.c`` into folder ``out_dir`` atomically."""
    header, source = c_source_text(table, prefix)
    return write_dir_atomic(out_dir, {f"{prefix}_table.h": header,
                                      f"{prefix}_table.c": source}, "C source folder")
