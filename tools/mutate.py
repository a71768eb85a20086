"""Mutation testing of patchloom's core, by hand: plant one small bug at a time in a copy of the
source tree and check that the module's own tests notice (fail, error or time out).

    nice -n 10 .venv/bin/python tools/mutate.py --sample 40 --seed 0 --json mutation.json
    nice -n 10 .venv/bin/python tools/mutate.py --modules packing/packer.py      # every mutant
    .venv/bin/python tools/mutate.py --list --modules image/sizing.py           # the sites only
    .venv/bin/python tools/mutate.py --show image/sizing.py:12                  # one mutant as a diff
    .venv/bin/python tools/mutate.py --only image/sizing.py:12 --tests tests/test_sizing.py
    .venv/bin/python tools/mutate.py --custom ledger.py 'led.read >=' 'led.read >' --tests tests/test_ledger.py

The working tree is never written: the tracked and untracked (not ignored) files are copied into a
temporary folder, the tests run there with PYTHONPATH pointing at the copy's src/, and the folder
is removed at the end (an interrupted run leaves nothing behind). Each module is first run
unmutated (after the same ast round trip the mutants get): a module whose tests fail then is
reported and not mutated. Results and the command: docs/mutation.md.
"""

from __future__ import annotations

import argparse
import ast
import copy
import difflib
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import zlib
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = "src/patchloom"


@dataclass(frozen=True)
class Target:
    """A core module, the test files that answer for it (fastest first: -x stops at the first
    failure), and optionally the only functions to mutate ("Class.method" prefixes)."""

    tests: tuple[str, ...]
    functions: tuple[str, ...] | None = None


#: module (under src/patchloom) -> its tests. Only these files run for that module's mutants.
CORE: dict[str, Target] = {
    "image/sizing.py": Target(("tests/test_sizing.py", "tests/reference/test_sizing_reference.py",
                               "tests/test_fast_paths.py", "tests/test_merge_grids.py")),
    "image/patches.py": Target(("tests/test_patches.py", "tests/reference/test_patches_reference.py",
                                "tests/test_merge_grids.py", "tests/test_chain.py")),
    "packing/assign.py": Target(("tests/test_packing.py", "tests/test_multi_image.py")),
    "packing/packer.py": Target(("tests/test_packing.py", "tests/test_batch.py", "tests/test_multi_image.py")),
    "packing/batch.py": Target(("tests/test_batch.py", "tests/reference/test_attention_reference.py",
                                "tests/test_multi_image.py")),
    "image/dropping.py": Target(("tests/test_dropping.py", "tests/test_merge_grids.py",
                                 "tests/reference/test_drop_statistics.py")),
    "seeding.py": Target(("tests/test_seeding.py", "tests/test_order.py", "tests/test_sources.py")),
    "ledger.py": Target(("tests/test_ledger.py", "tests/test_error_policy.py", "tests/test_ledger_faults.py")),
    "pipeline.py": Target(
        ("tests/test_pipeline.py", "tests/test_resume.py", "tests/test_ledger_faults.py"),
        functions=("Pipeline.in_buffer", "Pipeline.set_epoch", "Pipeline._setup", "Pipeline._restore",
                   "Pipeline._records", "Pipeline.__iter__", "Pipeline.state_dict", "Pipeline.load_state_dict",
                   "check_state", "check_state_version"),
    ),
    "read/order.py": Target(("tests/test_order.py", "tests/test_sources.py", "tests/test_resume.py")),
}

# The operators. boundary: off by one at a comparison; negate: the opposite comparison.
BOUNDARY = {ast.Lt: ast.LtE, ast.LtE: ast.Lt, ast.Gt: ast.GtE, ast.GtE: ast.Gt}
NEGATE = {ast.Lt: ast.GtE, ast.LtE: ast.Gt, ast.Gt: ast.LtE, ast.GtE: ast.Lt, ast.Eq: ast.NotEq,
          ast.NotEq: ast.Eq, ast.In: ast.NotIn, ast.NotIn: ast.In, ast.Is: ast.IsNot, ast.IsNot: ast.Is}
ARITH = {ast.Add: ast.Sub, ast.Sub: ast.Add}
DTYPES = {"int32": "int64", "int64": "int32", "float32": "float64", "float64": "float32"}
SYMBOL = {ast.Lt: "<", ast.LtE: "<=", ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==", ast.NotEq: "!=", ast.In: "in",
          ast.NotIn: "not in", ast.Is: "is", ast.IsNot: "is not", ast.Add: "+", ast.Sub: "-",
          ast.And: "and", ast.Or: "or"}
#: Calls whose arguments are messages only (mutating them changes words, not behaviour).
MESSAGE_CALLS = {"log", "logging", "warnings"}


@dataclass(frozen=True)
class Mutant:
    """One planted change: where (line in the original file), which operator, what to what."""

    module: str
    index: int
    line: int
    op: str
    before: str
    after: str

    @property
    def name(self) -> str:
        return f"{self.module}:{self.index}"


class Planter(ast.NodeTransformer):
    """Walks a module in a fixed order and numbers every mutation site; with `target` set, changes
    that one site. Skips what only words a message (raise, assert, f-strings, log and warnings
    calls), annotations, `if TYPE_CHECKING`, and functions outside `functions` when given."""

    def __init__(self, module: str, target: int | None = None, functions: tuple[str, ...] | None = None) -> None:
        self.module, self.target, self.functions = module, target, functions
        self.sites: list[Mutant] = []
        self.scope: list[str] = []

    def _active(self) -> bool:
        if self.functions is None:
            return True
        name = ".".join(self.scope)
        return any(name == f or name.startswith(f + ".") for f in self.functions)

    def _site(self, node: ast.AST, op: str, before: str, after: str) -> bool:
        """Number one site; True when it is the one to plant."""
        if not self._active():
            return False
        self.sites.append(Mutant(self.module, len(self.sites), node.lineno, op, before, after))
        return self.sites[-1].index == self.target

    # scopes and skipped contexts
    def visit_ClassDef(self, node: ast.ClassDef) -> ast.AST:
        self.scope.append(node.name)
        node = self.generic_visit(node)
        self.scope.pop()
        return node

    def visit_FunctionDef(self, node: ast.FunctionDef) -> ast.AST:
        self.scope.append(node.name)
        returns, node.returns = node.returns, None
        node.decorator_list, decorators = [], node.decorator_list
        node = self.generic_visit(node)
        node.returns, node.decorator_list = returns, decorators
        self.scope.pop()
        return node

    visit_AsyncFunctionDef = visit_FunctionDef

    def visit_arg(self, node: ast.arg) -> ast.AST:
        return node  # an annotation only

    def visit_AnnAssign(self, node: ast.AnnAssign) -> ast.AST:
        if node.value is not None:
            node.value = self.visit(node.value)
        return node

    def visit_Raise(self, node: ast.Raise) -> ast.AST:
        return node

    visit_Assert = visit_JoinedStr = visit_Raise

    def visit_If(self, node: ast.If) -> ast.AST:
        if isinstance(node.test, ast.Name) and node.test.id == "TYPE_CHECKING":
            return node
        return self.generic_visit(node)

    def visit_Call(self, node: ast.Call) -> ast.AST:
        func = node.func
        if isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name) and func.value.id in MESSAGE_CALLS:
            return node
        return self.generic_visit(node)

    # the operators
    def visit_Compare(self, node: ast.Compare) -> ast.AST:
        for i, op in enumerate(list(node.ops)):
            for kind, table in (("boundary", BOUNDARY), ("negate", NEGATE)):
                new = table.get(type(op))
                if new is not None and self._site(node, kind, SYMBOL[type(op)], SYMBOL[new]):
                    node.ops = [*node.ops[:i], new(), *node.ops[i + 1:]]
        return self.generic_visit(node)

    def visit_Constant(self, node: ast.Constant) -> ast.AST:
        if type(node.value) is int:
            for delta in (1, -1):
                if self._site(node, "constant", str(node.value), str(node.value + delta)):
                    return ast.copy_location(ast.Constant(node.value + delta), node)
        return node

    def visit_BoolOp(self, node: ast.BoolOp) -> ast.AST:
        new = ast.Or if isinstance(node.op, ast.And) else ast.And
        if self._site(node, "and/or", SYMBOL[type(node.op)], SYMBOL[new]):
            node.op = new()
        return self.generic_visit(node)

    def visit_BinOp(self, node: ast.BinOp) -> ast.AST:
        new = ARITH.get(type(node.op))
        if new is not None and self._site(node, "arith", SYMBOL[type(node.op)], SYMBOL[new]):
            node.op = new()
        return self.generic_visit(node)

    def visit_AugAssign(self, node: ast.AugAssign) -> ast.AST:
        new = ARITH.get(type(node.op))
        if new is not None and self._site(node, "arith", SYMBOL[type(node.op)] + "=", SYMBOL[new] + "="):
            node.op = new()
        return self.generic_visit(node)

    def visit_UnaryOp(self, node: ast.UnaryOp) -> ast.AST:
        if isinstance(node.op, ast.Not) and self._site(node, "not", "not x", "x"):
            return self.visit(node.operand)
        return self.generic_visit(node)

    def visit_Return(self, node: ast.Return) -> ast.AST:
        value = node.value
        if value is not None and not (isinstance(value, ast.Constant) and value.value is None):
            if self._site(node, "return", "return <value>", "return None"):
                node.value = ast.copy_location(ast.Constant(None), value)
                return node
        return self.generic_visit(node)

    def visit_Attribute(self, node: ast.Attribute) -> ast.AST:
        if isinstance(node.value, ast.Name) and node.value.id == "np" and node.attr in DTYPES:
            if self._site(node, "dtype", f"np.{node.attr}", f"np.{DTYPES[node.attr]}"):
                node.attr = DTYPES[node.attr]
                return node
        return self.generic_visit(node)

    def visit_Expr(self, node: ast.Expr) -> ast.AST:
        call = node.value
        if isinstance(call, ast.Call) and not (isinstance(call.func, ast.Attribute)
                                               and isinstance(call.func.value, ast.Name)
                                               and call.func.value.id in MESSAGE_CALLS):
            if self._site(node, "statement", ast.unparse(call)[:60], "pass"):
                return ast.copy_location(ast.Pass(), node)
        return self.generic_visit(node)


def sites(module: str, source: str) -> list[Mutant]:
    """Every mutation site of a module, numbered in walk order."""
    planter = Planter(module, None, CORE[module].functions)
    planter.visit(ast.parse(source))
    return planter.sites


def plant(module: str, source: str, index: int) -> str:
    """The module's source (after an ast round trip) with mutant `index` planted; index -1: none."""
    tree = ast.parse(source)
    if index >= 0:
        planter = Planter(module, index, CORE[module].functions)
        tree = planter.visit(copy.deepcopy(tree))
        if len(planter.sites) <= index:
            raise SystemExit(f"{module} has {len(planter.sites)} mutants, no number {index}")
    return ast.unparse(ast.fix_missing_locations(tree)) + "\n"


@dataclass
class Result:
    mutant: Mutant
    outcome: str  # killed, timeout, survived
    seconds: float
    by: str = ""  # the first failing test, when one is named


@dataclass
class Copy:
    """A throw-away copy of the working tree the tests run in."""

    root: Path
    env: dict[str, str] = field(default_factory=dict)

    def write(self, module: str, text: str) -> None:
        (self.root / PACKAGE / module).write_text(text, encoding="utf-8")

    def run(self, tests: tuple[str, ...], timeout: float) -> tuple[str, float, str]:
        """Run the test files with -x; (outcome, seconds, first failure) where outcome is pass, fail
        or timeout. A timed-out run's whole process group is killed."""
        shutil.rmtree(self.root / ".hypothesis", ignore_errors=True)  # no examples carried between mutants
        cmd = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", "--hypothesis-seed=0", *tests]
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, cwd=self.root, env=self.env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                text=True, start_new_session=True)
        try:
            out, _ = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.communicate()
            return "timeout", time.perf_counter() - t0, ""
        seconds = time.perf_counter() - t0
        first = next((line.split(" - ")[0] for line in out.splitlines() if line.startswith(("FAILED", "ERROR"))), "")
        return ("pass" if proc.returncode == 0 else "fail"), seconds, first


def make_copy(folder: Path) -> Copy:
    """Copy the tracked and untracked (not ignored) files; point PYTHONPATH at the copy's src/."""
    listed = subprocess.run(["git", "ls-files", "-co", "--exclude-standard", "-z"], cwd=ROOT, check=True,
                            capture_output=True).stdout.decode().split("\0")
    for rel in filter(None, listed):
        src = ROOT / rel
        if src.is_file():
            dst = folder / rel
            dst.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(src, dst)
    env = {**os.environ, "PYTHONPATH": str(folder / "src"), "PYTHONDONTWRITEBYTECODE": "1"}
    where = subprocess.run([sys.executable, "-c", "import patchloom; print(patchloom.__file__)"], cwd=folder,
                           env=env, capture_output=True, text=True, check=True).stdout.strip()
    if not where.startswith(str(folder)):
        raise SystemExit(f"patchloom imports from {where}, not from the copy in {folder}: check PYTHONPATH")
    return Copy(folder, env)


def choose(module: str, found: list[Mutant], sample: int | None, seed: int) -> list[Mutant]:
    """All mutants, or `sample` of them drawn per module from (seed, module name)."""
    if sample is None or sample >= len(found):
        return found
    rng = np.random.default_rng([seed, zlib.crc32(module.encode())])
    return [found[i] for i in sorted(rng.choice(len(found), size=sample, replace=False))]


def run_module(work: Copy, module: str, original: str, chosen: list[Mutant], tests: tuple[str, ...],
               factor: float) -> Iterator[Result]:
    """Baseline (unmutated, after the ast round trip), then each chosen mutant; the copy's file is
    put back after each."""
    work.write(module, plant(module, original, -1))
    outcome, base, first = work.run(tests, timeout=1800)
    if outcome != "pass":
        print(f"{module}: its tests fail before any mutant ({first or outcome}): not mutated; fix that first",
              flush=True)
        work.write(module, original)
        return
    timeout = factor * base + 10
    print(f"{module}: tests pass unmutated in {base:.1f} s; {len(chosen)} mutants, timeout {timeout:.0f} s",
          flush=True)
    try:
        for m in chosen:
            work.write(module, plant(module, original, m.index))
            outcome, seconds, first = work.run(tests, timeout)
            result = Result(m, {"pass": "survived", "fail": "killed"}.get(outcome, outcome), seconds, first)
            print(f"  {result.outcome:8s} {m.name:28s} line {m.line:4d} {m.op:9s} {m.before} -> {m.after}"
                  f"  ({seconds:.1f} s) {first}", flush=True)
            yield result
    finally:
        work.write(module, original)


def report(results: list[Result], totals: dict[str, int], source: dict[str, str]) -> str:
    """The score table per module, then each survivor with its line of source."""
    lines = [f"{'module':20s} {'sites':>5s} {'run':>4s} {'killed':>6s} {'score':>6s}"]
    by_module: dict[str, list[Result]] = {}
    for r in results:
        by_module.setdefault(r.mutant.module, []).append(r)
    for module, total in totals.items():
        rs = by_module.get(module, [])
        if not rs:
            lines.append(f"{module:20s} {total:5d}    0      -      -   (not run: its tests failed unmutated)")
            continue
        killed = sum(r.outcome != "survived" for r in rs)
        lines.append(f"{module:20s} {total:5d} {len(rs):4d} {killed:6d} {100 * killed / len(rs):5.0f}%")
    survivors = [r for r in results if r.outcome == "survived"]
    if survivors:
        lines.append("\nsurvivors:")
    for r in survivors:
        m = r.mutant
        text = source[m.module].splitlines()[m.line - 1].strip()
        lines.append(f"  {m.name:28s} line {m.line:4d} {m.op:9s} {m.before} -> {m.after}   | {text[:90]}")
    return "\n".join(lines)


def parse_name(name: str) -> tuple[str, int]:
    module, _, index = name.rpartition(":")
    if module not in CORE or not index.lstrip("-").isdigit():
        raise SystemExit(f"{name!r}: give MODULE:NUMBER with MODULE one of {', '.join(CORE)}")
    return module, int(index)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--modules", default=",".join(CORE), help="comma-separated modules under src/patchloom")
    ap.add_argument("--sample", type=int, default=None, help="mutants per module, drawn at random (default: all)")
    ap.add_argument("--seed", type=int, default=0, help="seed of the --sample draw")
    ap.add_argument("--timeout-factor", type=float, default=3.0,
                    help="a mutant times out after this many times the unmutated run, plus 10 s")
    ap.add_argument("--list", action="store_true", help="list the mutation sites and exit")
    ap.add_argument("--show", metavar="MODULE:N", help="print mutant N of MODULE as a diff and exit")
    ap.add_argument("--only", metavar="MODULE:N", help="run one mutant")
    ap.add_argument("--custom", nargs=3, metavar=("MODULE", "OLD", "NEW"),
                    help="run a hand-made mutant: replace the one occurrence of OLD by NEW in MODULE")
    ap.add_argument("--tests", nargs="+", help="test files (or node ids) to run instead of the module's table entry")
    ap.add_argument("--json", metavar="PATH", help="write every result as JSON")
    args = ap.parse_args(argv)

    modules = [m.strip() for m in args.modules.split(",") if m.strip()]
    for m in modules:
        if m not in CORE:
            raise SystemExit(f"unknown core module {m!r}: one of {', '.join(CORE)}")
    source = {m: (ROOT / PACKAGE / m).read_text(encoding="utf-8") for m in CORE}

    if args.list:
        for m in modules:
            for s in sites(m, source[m]):
                print(f"{s.name:28s} line {s.line:4d} {s.op:9s} {s.before} -> {s.after}")
        return 0
    if args.show:
        module, index = parse_name(args.show)
        before, after = plant(module, source[module], -1), plant(module, source[module], index)
        sys.stdout.writelines(difflib.unified_diff(before.splitlines(True), after.splitlines(True),
                                                   f"a/{module}", f"b/{module} (mutant {index})"))
        return 0

    head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout
    dirty = subprocess.run(["git", "status", "--porcelain"], cwd=ROOT, capture_output=True, text=True).stdout
    print(f"working tree at {head.strip()} with {len(dirty.splitlines())} changed or new files", flush=True)
    with tempfile.TemporaryDirectory(prefix="patchloom-mutate-") as folder:
        work = make_copy(Path(folder))
        # Mutate the snapshot, not the working tree (others may be editing it meanwhile).
        source = {m: (work.root / PACKAGE / m).read_text(encoding="utf-8") for m in CORE}
        if args.custom:
            module, old, new = args.custom
            if module not in CORE or source[module].count(old) != 1:
                raise SystemExit(f"{old!r} must occur exactly once in {module}")
            work.write(module, source[module].replace(old, new))
            outcome, seconds, first = work.run(tuple(args.tests or CORE[module].tests), timeout=1800)
            print(f"{'killed' if outcome != 'pass' else 'survived'} ({outcome}, {seconds:.1f} s) {first}")
            return 0 if outcome != "pass" else 1
        if args.only:
            module, index = parse_name(args.only)
            modules, chosen = [module], {module: [sites(module, source[module])[index]]}
        else:
            chosen = {m: choose(m, sites(m, source[m]), args.sample, args.seed) for m in modules}
        totals = {m: len(sites(m, source[m])) for m in modules}
        results: list[Result] = []
        t0 = time.perf_counter()
        for m in modules:
            tests = tuple(args.tests or CORE[m].tests)
            results.extend(run_module(work, m, source[m], chosen[m], tests, args.timeout_factor))
    print(f"\n{len(results)} mutants in {(time.perf_counter() - t0) / 60:.1f} min\n")
    print(report(results, totals, source))
    if args.json:
        rows = [{**asdict(r.mutant), "outcome": r.outcome, "seconds": round(r.seconds, 2), "by": r.by,
                 "source": source[r.mutant.module].splitlines()[r.mutant.line - 1].strip()} for r in results]
        Path(args.json).write_text(json.dumps(rows, indent=1) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
