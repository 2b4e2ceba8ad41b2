"""Mutation run: plant one small wrong change at a time and see whether the tests notice.

Run by hand (not a test, not in CI), from the repository root::

    python3 benchmarks/mutate.py --jobs 2 > mutate.log  # every target module, 6 mutants each
    python3 benchmarks/mutate.py --rerun mutate.log     # that run's survivors again, after new tests
    python3 benchmarks/mutate.py --modules models/summary.py models/devices/ekv.py
    python3 benchmarks/mutate.py --max-mutants 10 --jobs 2 --seed 3
    python3 benchmarks/mutate.py --list                 # the planted changes only, nothing run
    python3 benchmarks/mutate.py --named                # only the hand-written changes of NAMED

The package, its tests and studies are copied to a temporary folder; each mutant is one
module of that copy rewritten through `ast` with a single change, and the mapped subset of
tests (`TESTS`) runs against the copy with ``pytest -x -q``. The working tree is never
touched. A mutant is killed when the tests fail (or time out: four times the clean run
plus 20 s); it survives when they pass. Printed: per module the mutants, killed, kill
rate and time, then every survivor as ``file:line  change``.

Changes planted (one per mutant):
- arithmetic operator swaps: + <-> -, * <-> /, ** -> *;
- numeric constants scaled by 0.95 or 1.05 (alternating by site), 0 and 1 left alone;
- sign flips: a unary minus removed, += <-> -=;
- min <-> max (``min``/``max``, ``np.minimum``/``np.maximum``, ``.min()``/``.max()``,
  ``np.argmin``/``np.argmax``, ``np.fmin``/``np.fmax``);
- comparison flips: < <-> >=, > <-> <=, == <-> !=; masks & <-> |.

Left out, as changes no test can or should see: docstrings and text (f-strings, raise
statements and their messages), input-range checks (`check_range` arguments and the
records' ``__post_init__``), and numerical guards: constants below 1e-12 in magnitude
(floors such as 1e-300 or 1e-30 that only keep a division finite) and the values of
keyword arguments that are solver tolerances or iteration limits (``xtol``, ``tol``,
``max_iter``, ``iterations``, ``step_max``).

Survivors argued equivalent (`EQUIVALENT`: the change cannot alter any output, each with
its reason) are marked in the survivor list, and each scope's kill rate is printed twice:
over every mutant, and over the mutants less those argued equivalent.

Sampling: when a module has more sites than --max-mutants (default 6: about 190 mutants,
35-60 minutes with two jobs on two shared cores), a seeded random sample of that many is
taken (the same seed and the same modules give the same mutants). --rerun reads an earlier
run's output, runs its survivors again and prints that sample's kill rate with the new
outcomes.
"""
from __future__ import annotations

import argparse
import ast
import concurrent.futures
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]

# Metric code of optimise/ beside all of models/.
OPTIMISE_TARGETS = ["optimise/review/evaluation.py", "optimise/search/export.py"]

# A fast subset per module: the direct checks of the metrics first, then the device, solver
# and stage tests; the slower suites (CLI, every Iq case in ngspice) are left out for models/.
MODEL_TESTS = ["tests/test_metrics.py", "tests/test_metrics_budgets.py", "tests/test_device_checks.py",
               "tests/test_mos.py", "tests/test_mismatch.py", "tests/test_solvers.py", "tests/test_stages.py",
               "tests/test_metrics_ngspice.py", "tests/test_mos_ngspice.py"]
# Module (path prefix; the longest match wins) -> tests run against its mutants, the module's
# own tests first so that -x stops early on a kill.
TESTS = {
    "models/": MODEL_TESTS,
    "models/amplifier/": ["tests/test_metrics_budgets.py", "tests/test_amplifier.py", "tests/test_amplifier_fast.py",
                          "tests/test_amplifier_ngspice.py", "tests/test_metrics.py", "tests/test_topology.py",
                          "tests/test_junctions_ngspice.py"],
    "models/circuit/topology.py": ["tests/test_topology.py", *MODEL_TESTS],
    "models/circuit/mirrors.py": ["tests/test_metrics_budgets.py", "tests/test_mirrors.py",
                                  "tests/test_mirrors_ngspice.py", "tests/test_metrics.py"],
    "models/sources.py": ["tests/test_metrics_budgets.py", "tests/test_mirrors.py", "tests/test_mirrors_ngspice.py",
                          "tests/test_metrics.py"],
    "models/devices/": [*MODEL_TESTS, "tests/test_amplifier.py", "tests/test_junctions_ngspice.py"],
    "models/devices/table": ["tests/test_device_checks.py", "tests/test_table_kind.py", "tests/test_table_compiled.py",
                             "tests/test_mos.py", "tests/test_metrics_budgets.py"],
    "models/validity.py": ["tests/test_validity.py", *MODEL_TESTS],
    "models/wording.py": ["tests/test_wording.py", "tests/test_messages.py", "tests/test_metrics.py"],
    "models/operating.py": [*MODEL_TESTS, "tests/test_ab_ratio_ngspice.py", "tests/test_mirrors.py"],
    "models/records.py": ["tests/test_records.py", *MODEL_TESTS],
    "optimise/review/evaluation.py": ["tests/test_metrics.py", "tests/test_cli.py", "tests/test_json_safe.py"],
    "optimise/search/export.py": ["tests/test_metrics.py", "tests/test_search.py", "tests/test_compare_pick.py"],
}
COPY = ("models", "optimise", "tests", "studies", "pyproject.toml")
SWAP_NAMES = {"min": "max", "max": "min", "minimum": "maximum", "maximum": "minimum", "argmin": "argmax",
              "argmax": "argmin", "fmin": "fmax", "fmax": "fmin", "nanmin": "nanmax", "nanmax": "nanmin"}
BINOPS = {ast.Add: ast.Sub, ast.Sub: ast.Add, ast.Mult: ast.Div, ast.Div: ast.Mult, ast.Pow: ast.Mult,
          ast.BitAnd: ast.BitOr, ast.BitOr: ast.BitAnd}
CMPOPS = {ast.Lt: ast.GtE, ast.GtE: ast.Lt, ast.Gt: ast.LtE, ast.LtE: ast.Gt, ast.Eq: ast.NotEq, ast.NotEq: ast.Eq}
SYMBOL = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**", ast.BitAnd: "&", ast.BitOr: "|",
          ast.Lt: "<", ast.GtE: ">=", ast.Gt: ">", ast.LtE: "<=", ast.Eq: "==", ast.NotEq: "!="}
# Hand-written wrong changes (path, text, replacement): each once in its file. Small errors a
# reviewer could miss, in the numbers the tool reports.
NAMED = [
    ("models/devices/conditions.py", "return 2.0 * m.n * m.kp", "return 0.95 * 2.0 * m.n * m.kp"),
    ("models/devices/mismatch.py", "return sigma_pair_vt(a_vt, w, l) / np.sqrt(2.0)",
     "return sigma_pair_vt(a_vt, w, l) / np.sqrt(1.9)"),
    ("models/devices/mismatch.py", "return sigma_pair_beta(a_beta, w, l) / np.sqrt(2.0)",
     "return sigma_pair_beta(a_beta, w, l) / np.sqrt(1.9)"),
    ("models/circuit/nodal.py", "s_beta = -(d.p * i_d / (1.0 + d.dbeta)) * w", "s_beta = (d.p * i_d / (1.0 + d.dbeta)) * w"),
    ("models/summary.py", "100.0 * (i_hi - i_lo) / ref", "100.0 * (i_lo - i_hi) / ref"),
    ("models/summary.py", "/ ref / max(span, 1e-300)", "/ ref"),
    ("models/evaluate.py", "fp2 = gm / (2.0 * np.pi * c_out)", "fp2 = gm / (np.pi * c_out)"),
    ("models/operating.py", "worst = np.minimum(worst, np.abs(i))", "worst = np.maximum(worst, np.abs(i))"),
    ("models/stages/fixed_bias.py", '("mn_out leaves saturation", 2.0 *', '("mn_out leaves saturation", 1.0 *'),
    ("models/stages/fixed_bias.py", '("mp_out leaves saturation", 2.0 *', '("mp_out leaves saturation", 1.0 *'),
    ("models/summary.py", '(pvt["iq_a"] + np.asarray(stage.bias_total(bias), dtype=float)[:, None])',
     '(pvt["iq_a"])'),
]
GUARD_KEYWORDS = {"xtol", "tol", "rtol", "atol", "max_iter", "iterations", "step_max"}
# Survivors argued equivalent: (path, text of the mutated line, change, why no output can
# change[, which one]: the ordinal among the file's sites with that change on lines holding
# that text, when only one of them is equivalent). Matched on the line's text, so they follow
# the code when lines move; a changed line drops out of this list and its mutant counts
# again. Reported apart and left out of the second kill rate (killed / (mutants -
# equivalent)); the first rate counts them.
EQUIVALENT = [
    ("models/amplifier/smallsignal.py", "(bulk, -p * (gg + gd + gs))", "unary - removed",
     "the bulk is a rail (skipped: AC ground) or, for a tied device, its source (bulk = spec.s if dev.tied else "
     "spec.rail), where Device.eval's gs = -(gg + gd) makes the sum exactly 0"),
    ("models/devices/device.py", "frame_vsb = self.p * (vs_b - vb_eff)", "* -> /",
     "p is +1 or -1: x / p == x * p exactly"),
    ("models/devices/device.py", "if isinstance(idx, np.ndarray) and idx.size == np.size(dev.w)", "- -> +",
     "the whole-batch shortcut is skipped: the restricted copy has the same values"),
    ("models/devices/device.py", "and idx[0] == 0:", "== -> !=",
     "a sorted full-size index set ending at size - 1 starts at 0: the shortcut is skipped, same values"),
    ("models/devices/table.py", "return vsb + _newton(fun, _start_vgs(m, w, l, i) + c.dvt)", "+ -> -",
     "the Newton start only: the same root to the solver's tolerance", 0),  # "+ c.dvt", not "vsb +"
    ("models/devices/table.py", "start = vgb - _start_vgs(m, w, l, i) - c.dvt", "- -> +",
     "the Newton start only: the same root to the solver's tolerance"),
    ("models/devices/table_data.py", "k = np.clip(np.sum(yy < crit, axis=-1) - 1, 0, len(t.vgs) - 2)",
     "unary - removed", "yy is two-dimensional: axis 1 is axis -1"),
    ("models/numerics/linear.py", "key = (strong < 0.01, (len(cols) - 1) * (len(col_rows[c]) - 1), -strong)",
     "0.01 -> 0.01 x 0.95", "the pivot order of the sparse elimination only: the same solution to rounding"),
    ("models/numerics/linear.py", "key = (strong < 0.01, (len(cols) - 1) * (len(col_rows[c]) - 1), -strong)",
     "- -> +", "the pivot order of the sparse elimination only: the same solution to rounding"),
    ("models/numerics/roots.py", "if 0 < n < 0.5 * self.live.size:", "0.5 -> 0.5 x 0.95",
     "when the working set shrinks: each element's iterates do not depend on its batch neighbours"),
    ("models/numerics/roots.py", "if x.shape[0] == 2:", "2 -> 2 x 0.95",
     "two unknowns then go through the general solve instead of Cramer's rule: the same step to rounding"),
    ("models/operating.py", "return (u - dn) * direction - i_load, dd * direction", "* -> /",
     "direction is +1 or -1: x / d == x * d exactly"),
    ("models/operating.py", "idle_mid = i_dn if direction > 0 else i_up", "> -> <=",
     "the Newton start of the bracketed headroom solve only: the same root to its 0.1 uV tolerance"),
    ("models/sources.py", "per[name] = np.where(converged, np.nan_to_num(rel, nan=-1.0), np.inf)", "unary - removed",
     "at a converged point the voltage across and the limit are finite, so rel is never nan there"),
    ("models/stages/fixed_bias.py", "gn, ok = solve_bracketed(fun, -vb - 0.5, vdd + 0.5, x0=0.5 * (vdd - vb))",
     "0.5 -> 0.5 x 1.05", "the bracket ends (0.5 V beyond either rail) and the Newton start of a bracketed solve "
     "whose root lies well inside: the same root to its tolerance"),
    ("models/stages/floating_loop.py", "other, ok = solve_bracketed(fun, -0.5 * np.ones_like(vdd), vdd + 0.5, x0=x0)",
     "* -> /", "-0.5 / ones is -0.5 * ones exactly"),
    ("models/devices/table.py", "return vb + p * _newton(fun, start)", "* -> /", "p is +1 or -1: x / p == x * p exactly"),
    ("models/devices/table_data.py", "if len(t.lengths) < 2:", "2 -> 2 x 0.95",
     "a length count is an integer: < 1.9 and < 2 refuse the same tables"),
    ("models/devices/device.py", "if isinstance(idx, np.ndarray) and idx.size == np.size(dev.w)", "== -> !=",
     "the whole-batch shortcut is skipped (or taken for a smaller index set, which then fails its next check): "
     "the restricted copy has the same values"),
    ("models/numerics/roots.py", "if 0 < n < 0.5 * self.live.size:", "* -> /",
     "when the working set shrinks: each element's iterates do not depend on its batch neighbours"),
    ("models/circuit/mirrors.py", "return np.asarray(v[src.a]) - np.asarray(v[src.b])", "- -> +",
     "the stage's fast solve takes the mirror currents as a start only; the nodal system then balances each "
     "source by its Norton stamp, which does not use it: the same rest point to the solver's tolerance"),
    ("models/amplifier/response.py", "SPREAD = 1e-6", "1e-06 -> 1e-06 x 0.95",
     "which elements the two-node closed form leaves to LAPACK: both agree to about 1e-10 there"),
    ("models/amplifier/response.py", "trust &= np.abs(disc) >= CANCEL * (quarter + np.abs(b01 * b10))", "+ -> -",
     "which elements the two-node closed form leaves to LAPACK: both agree to about 1e-10 there"),
    ("models/amplifier/response.py", "est = np.clip(np.log10(t0 / (TWO_PI * np.maximum(dom, 1e-300))), "
     "np.log10(F_LOW) + 1e-6,", "+ -> -", "the Newton start of the bracketed unity-gain search only: the same "
     "crossing to its 1e-9-decade tolerance"),
    ("models/operating.py", "x0 = rail - direction * np.clip((i_load + idle_mid) / np.maximum(np.abs(d_rail), 1e-30), "
     "0.0, 0.5 * vdd)", "0.5 -> 0.5 x 1.05", "the Newton start of the bracketed headroom solve only: the same "
     "root to its 0.1 uV tolerance"),
    ("models/stages/floating_loop.py", "gn, ok = solve_bracketed(fun, -0.5 * np.ones(m), vdd.copy())",
     "0.5 -> 0.5 x 1.05", "a bracket end 0.5 V below ground for a gate whose root lies between the rails: the same "
     "root to its tolerance"),
    ("models/stages/floating_loop.py", 'slope = 1.0 if driven_node == "gp" else -1.0', "== -> !=",
     "the slope is a rough Newton derivative of a bracketed solve: the same root to its tolerance"),
    ("models/stages/floating_loop.py", 'slope = 1.0 if driven_node == "gp" else -1.0', "unary - removed",
     "the slope is a rough Newton derivative of a bracketed solve: the same root to its tolerance"),
    ("models/stages/follower.py", "nm, ok = solve_bracketed(fun, -1.0 - vdd, 2.0 * vdd + 1.0, x0=nodes[\"nm\"])",
     "unary - removed", "the lower bracket end 1 V - VDD instead of -1 V - VDD: the input of a follower at its "
     "drive limit lies well above both"),
    ("models/validity.py", "EQUAL_RTOL = 1e-6", "1e-06 -> 1e-06 x 1.05",
     "replica and device lengths equal up to rounding differ by far less than either threshold"),
]


@dataclass(frozen=True)
class Site:
    """One planted change: the module, the site's position in the walk, line and wording."""

    path: str
    index: int
    line: int
    text: str


def _skipped(tree: ast.AST) -> set[int]:
    """ids of the nodes whose subtrees are never mutated (see the module notes)."""
    skip: set[int] = set()

    def mark(node):
        for sub in ast.walk(node):
            skip.add(id(sub))

    for node in ast.walk(tree):
        if isinstance(node, (ast.Raise, ast.JoinedStr, ast.Assert)):
            mark(node)
        elif isinstance(node, ast.Call):
            name = node.func.attr if isinstance(node.func, ast.Attribute) else getattr(node.func, "id", "")
            if name in ("check_range", "ValueError", "TypeError", "KeyError", "IndexError", "warn"):
                mark(node)
            for kw in node.keywords:
                if kw.arg in GUARD_KEYWORDS:
                    mark(kw.value)
        elif isinstance(node, (ast.FunctionDef, ast.ClassDef, ast.Module)):
            body = node.body
            if body and isinstance(body[0], ast.Expr) and isinstance(getattr(body[0], "value", None), ast.Constant):
                mark(body[0])
            if isinstance(node, ast.FunctionDef):
                if node.name == "__post_init__":
                    mark(node)
                for arg, default in zip(reversed(node.args.args + node.args.kwonlyargs),
                                        reversed(node.args.defaults + node.args.kw_defaults)):
                    if default is not None and arg.arg in GUARD_KEYWORDS:
                        mark(default)
                for a in node.args.args + node.args.kwonlyargs:
                    if a.annotation is not None:
                        mark(a.annotation)
                if node.returns is not None:
                    mark(node.returns)
        elif isinstance(node, ast.AnnAssign):
            mark(node.annotation)
    return skip


class Planter(ast.NodeTransformer):
    """Walks a module in a fixed order; numbers its mutation sites and, when `target` is
    set, applies the change at that site only."""

    def __init__(self, skip: set[int], target: int | None = None):
        self.skip, self.target, self.count, self.sites = skip, target, 0, []

    def _site(self, node, text) -> bool:
        k = self.count
        self.count += 1
        if self.target is None:
            self.sites.append((k, getattr(node, "lineno", 0), text))
        return k == self.target

    def visit_BinOp(self, node):
        self.generic_visit(node)
        new = BINOPS.get(type(node.op))
        if new and id(node) not in self.skip and self._site(node, f"{SYMBOL[type(node.op)]} -> {SYMBOL[new]}"):
            node.op = new()
        return node

    def visit_AugAssign(self, node):
        self.generic_visit(node)
        if isinstance(node.op, (ast.Add, ast.Sub)) and id(node) not in self.skip:
            new = ast.Sub if isinstance(node.op, ast.Add) else ast.Add
            if self._site(node, f"{SYMBOL[type(node.op)]}= -> {SYMBOL[new]}="):
                node.op = new()
        return node

    def visit_UnaryOp(self, node):
        self.generic_visit(node)
        if isinstance(node.op, ast.USub) and id(node) not in self.skip:
            if isinstance(node.operand, ast.Constant) and node.operand.value in (0, 0.0):
                return node
            if self._site(node, "unary - removed"):
                return node.operand
        return node

    def visit_Compare(self, node):
        self.generic_visit(node)
        if id(node) in self.skip:
            return node
        for j, op in enumerate(node.ops):
            new = CMPOPS.get(type(op))
            if new and self._site(node, f"{SYMBOL[type(op)]} -> {SYMBOL[new]}"):
                node.ops[j] = new()
        return node

    def visit_Constant(self, node):
        v = node.value
        if id(node) in self.skip or isinstance(v, bool) or not isinstance(v, (int, float)):
            return node
        if v in (0, 1) or abs(v) < 1e-12:
            return node
        factor = 0.95 if self.count % 2 == 0 else 1.05
        if self._site(node, f"{v!r} -> {v!r} x {factor}"):
            return ast.copy_location(ast.Constant(v * factor), node)
        return node

    def _swap(self, node, attr_holder, attr):
        name = getattr(attr_holder, attr)
        if name in SWAP_NAMES and self._site(node, f"{name} -> {SWAP_NAMES[name]}"):
            setattr(attr_holder, attr, SWAP_NAMES[name])

    def visit_Call(self, node):
        self.generic_visit(node)
        if id(node) in self.skip:
            return node
        if isinstance(node.func, ast.Name):
            self._swap(node, node.func, "id")
        elif isinstance(node.func, ast.Attribute):
            self._swap(node, node.func, "attr")
        return node


def sites(path: Path) -> list[Site]:
    tree = ast.parse(path.read_text())
    planter = Planter(_skipped(tree))
    planter.visit(tree)
    rel = str(path.relative_to(REPO))
    return [Site(rel, k, line, text) for k, line, text in planter.sites]


def mutated_source(path: Path, index: int) -> str:
    tree = ast.parse(path.read_text())
    planter = Planter(_skipped(tree), index)
    planter.visit(tree)
    ast.fix_missing_locations(tree)
    return ast.unparse(tree)


def tests_for(rel: str) -> list[str]:
    best = max((k for k in TESTS if rel.startswith(k)), key=len)
    return [t for t in TESTS[best] if (REPO / t).exists()]


def make_copy() -> Path:
    root = Path(tempfile.mkdtemp(prefix="stagefront-mutate-"))
    for name in COPY:
        src = REPO / name
        if src.is_dir():
            shutil.copytree(src, root / name, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        elif src.exists():
            shutil.copy2(src, root / name)
    return root


def run_tests(root: Path, tests: list[str], timeout: float) -> tuple[str, float]:
    """'pass', 'fail' or 'timeout', and the wall time."""
    env = dict(os.environ, PYTHONPATH=str(root), PYTHONDONTWRITEBYTECODE="1")
    t0 = time.perf_counter()
    try:
        proc = subprocess.run([sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", *tests],
                              cwd=root, env=env, capture_output=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return "timeout", time.perf_counter() - t0
    return ("pass" if proc.returncode == 0 else "fail"), time.perf_counter() - t0


def equivalent_reason(site: Site) -> str | None:
    """Why a mutant is argued equivalent (`EQUIVALENT`), or None."""
    if site.index < 0:
        return None
    lines = (REPO / site.path).read_text().splitlines()
    for path, text, change, why, *nth in EQUIVALENT:
        if path != site.path or change != site.text or text not in lines[site.line - 1]:
            continue
        if nth:
            same = [s.index for s in sites(REPO / path) if s.text == change and text in lines[s.line - 1]]
            if same.index(site.index) != nth[0]:
                continue
        return why
    return None


def named_sites() -> list[Site]:
    out = []
    for k, (path, old, new) in enumerate(NAMED):
        text = (REPO / path).read_text()
        if text.count(old) != 1:
            raise SystemExit(f"NAMED change {k}: {old!r} occurs {text.count(old)} times in {path}, not once")
        out.append(Site(path, -1 - k, text[:text.index(old)].count("\n") + 1, f"{old} -> {new}"))
    return out


def rerun_sites(log: Path) -> list[Site]:
    """The sites of the survivors listed in an earlier run's output (lines
    ``  path:line  change: survived``); every site with that path, line and change."""
    wanted = set()
    for line in log.read_text().splitlines():
        if line.startswith("  ") and line.rstrip().endswith(")") and ": survived (" in line:
            where, text = line.strip().split("  ", 1)
            path, lineno = where.rsplit(":", 1)
            wanted.add((path, int(lineno), text.rsplit(": survived (", 1)[0]))
    out = []
    for path in sorted({w[0] for w in wanted}):
        out += [s for s in sites(REPO / path) if (s.path, s.line, s.text) in wanted]
    return out


def source_of(site: Site) -> str:
    if site.index < 0:
        path, old, new = NAMED[-1 - site.index]
        return (REPO / path).read_text().replace(old, new)
    return mutated_source(REPO / site.path, site.index)


def run_mutant(root: Path, site: Site, timeout: float) -> tuple[Site, str, float]:
    target = root / site.path
    original = target.read_text()
    try:
        target.write_text(source_of(site))
        outcome, wall = run_tests(root, tests_for(site.path), timeout)
    finally:
        target.write_text(original)
    return site, outcome, wall


def targets(modules: list[str] | None) -> list[Path]:
    if modules:
        return [REPO / m for m in modules]
    found = sorted(p for p in (REPO / "models").rglob("*.py") if p.name != "__init__.py")
    return found + [REPO / t for t in OPTIMISE_TARGETS]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--modules", nargs="*", help="module files relative to the repository (default: all targets)")
    ap.add_argument("--max-mutants", type=int, default=6, help="mutants per module (seeded sample); 0: all")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--jobs", type=int, default=1, help="mutants run at once (each in its own copy)")
    ap.add_argument("--list", action="store_true", help="print the chosen mutants and stop")
    ap.add_argument("--named", action="store_true", help="run the hand-written changes of NAMED instead")
    ap.add_argument("--rerun", metavar="LOG", help="run again only the survivors printed in an earlier run's output")
    args = ap.parse_args()
    signal.signal(signal.SIGTERM, lambda *_: sys.exit(1))  # so a killed run still removes its copies

    rng = random.Random(args.seed)
    chosen: list[Site] = named_sites() if args.named else []
    if args.rerun:
        chosen = rerun_sites(Path(args.rerun))
    for path in [] if args.named or args.rerun else targets(args.modules):
        all_sites = sites(path)
        pick = all_sites if not args.max_mutants or len(all_sites) <= args.max_mutants else \
            sorted(rng.sample(all_sites, args.max_mutants), key=lambda s: s.index)
        chosen += pick
        print(f"{path.relative_to(REPO)}: {len(all_sites)} sites, {len(pick)} chosen", flush=True)
    if args.list:
        for s in chosen:
            print(f"  {s.path}:{s.line}  {s.text}")
        return 0

    roots = [make_copy() for _ in range(max(args.jobs, 1))]
    try:
        clean: dict[tuple, float] = {}
        for group in sorted({tuple(tests_for(s.path)) for s in chosen}):
            outcome, wall = run_tests(roots[0], list(group), timeout=1800)
            if outcome != "pass":
                print(f"the unmutated copy fails {' '.join(group)}: fix the suite first", file=sys.stderr)
                return 2
            clean[group] = wall
            print(f"clean run {wall:6.1f} s: {' '.join(group)}", flush=True)
        t_start = time.perf_counter()
        results: list[tuple[Site, str, float]] = []
        free = list(roots)
        with concurrent.futures.ThreadPoolExecutor(max_workers=len(roots)) as pool:
            pending = {}
            queue = list(chosen)
            while queue or pending:
                while queue and free:
                    site = queue.pop(0)
                    root = free.pop()
                    timeout = 4.0 * clean[tuple(tests_for(site.path))] + 20.0
                    pending[pool.submit(run_mutant, root, site, timeout)] = root
                done, _ = concurrent.futures.wait(pending, return_when=concurrent.futures.FIRST_COMPLETED)
                for fut in done:
                    free.append(pending.pop(fut))
                    site, outcome, wall = fut.result()
                    results.append((site, outcome, wall))
                    mark = "survived" if outcome == "pass" else "killed" + (" (timeout)" if outcome == "timeout" else "")
                    print(f"  {site.path}:{site.line}  {site.text}: {mark} ({wall:.1f} s)", flush=True)
        total = time.perf_counter() - t_start
    finally:
        for root in roots:
            shutil.rmtree(root, ignore_errors=True)

    print("\nmodule                                   mutants  killed  kill rate   time [s]")
    by_module: dict[str, list] = {}
    for r in results:
        by_module.setdefault(r[0].path, []).append(r)
    for scope in ("models/", "optimise/"):
        n_all = k_all = 0
        for mod in sorted(m for m in by_module if m.startswith(scope)):
            rs = by_module[mod]
            killed = sum(o != "pass" for _, o, _ in rs)
            n_all, k_all = n_all + len(rs), k_all + killed
            print(f"{mod:40s} {len(rs):7d} {killed:7d} {100.0 * killed / len(rs):8.1f} % {sum(w for *_, w in rs):9.0f}")
        if n_all:
            print(f"{'all of ' + scope:40s} {n_all:7d} {k_all:7d} {100.0 * k_all / n_all:8.1f} %")
            n_eq = sum(o == "pass" and equivalent_reason(s) is not None for s, o, _ in results
                       if s.path.startswith(scope))
            if n_eq and n_all > n_eq:
                print(f"{'  less ' + str(n_eq) + ' argued equivalent':40s} {n_all - n_eq:7d} {k_all:7d} "
                      f"{100.0 * k_all / (n_all - n_eq):8.1f} %")
    print(f"wall time {total:.0f} s with {len(roots)} job(s)")
    if args.rerun:
        # The earlier run's whole sample with these survivors' new outcomes.
        earlier = [line for line in Path(args.rerun).read_text().splitlines()
                   if line.startswith("  ") and (": survived (" in line or ": killed" in line)]
        # A survivor's line may match several sites (two "* -> /" on one line): it counts as
        # killed now only when every one of them is.
        alive: dict[tuple, bool] = {}
        equivalent: dict[tuple, bool] = {}
        for s, o, _ in results:
            key = (s.path, s.line, s.text)
            alive[key] = alive.get(key, False) or o == "pass"
            if o == "pass":
                equivalent[key] = equivalent.get(key, True) and equivalent_reason(s) is not None
        now_killed = sum(not a for a in alive.values())
        for scope in ("models/", "optimise/"):
            mine = [line for line in earlier if line.strip().startswith(scope)]
            before = sum(": killed" in line for line in mine)
            after = before + sum(not a for key, a in alive.items() if key[0].startswith(scope))
            n_eq = sum(a and equivalent.get(key, False) for key, a in alive.items() if key[0].startswith(scope))
            if mine:
                print(f"earlier sample, {scope}: {before} of {len(mine)} killed ({100.0 * before / len(mine):.1f} %); "
                      f"with this rerun {after} ({100.0 * after / len(mine):.1f} %); less the {n_eq} argued "
                      f"equivalent, {after} of {len(mine) - n_eq} ({100.0 * after / max(len(mine) - n_eq, 1):.1f} %)")
        print(f"rerun: {now_killed} of {len(alive)} earlier survivors killed now")
    survivors = [s for s, o, _ in results if o == "pass"]
    print(f"\nsurvivors ({len(survivors)}):")
    for s in sorted(survivors, key=lambda s: (s.path, s.line)):
        why = equivalent_reason(s)
        print(f"  {s.path}:{s.line}  {s.text}" + (f"  [equivalent: {why}]" if why else ""))
    return 0


if __name__ == "__main__":
    sys.exit(main())
