"""Mutation testing of one area of benchharness with cosmic-ray, on a fixed-seed sample.

Not part of the tool: a developer's script (DEVELOPERS.md, "Mutation testing"). It needs
the ``dev`` extra (cosmic-ray, coverage). Every step works in a scratch folder
(``$MUTATION_WORK``, default ``/tmp/benchharness-mutation``) on copies of the checkout,
never on the checkout itself: cosmic-ray writes each mutant into the files it tests.
``$MUTATION_ROOT`` names another checkout to measure (default: this one), for example a
clone pinned at the commit whose mutants are drawn; ``$MUTATION_TESTS`` the checkout whose
``tests/`` are run against it (default: ``$MUTATION_ROOT``), for the tests written since.

    python experiments/mutation/mutants.py map AREA      # which tests run which line
    python experiments/mutation/mutants.py durations AREA  # each test's time (optional)
    python experiments/mutation/mutants.py init AREA     # the mutants, a sample of them
    python experiments/mutation/mutants.py exec AREA     # run the sample (resumable)
    python experiments/mutation/mutants.py rerun AREA    # survivors again, current tests
    python experiments/mutation/mutants.py report AREA [-v]
    python experiments/mutation/mutants.py summary AREA... [--n=N]  # equal samples

Areas, their modules, sample sizes and test files are in ``areas.json`` beside this
script. ``init`` leaves out the mutants inside annotations (never evaluated under
``from __future__ import annotations``, so equivalent by construction), restricts an
area to the functions it names, sorts the rest by (module, line, column, operator,
occurrence) and keeps ``random.Random(seed).sample(..., sample)`` of them.

Each mutant runs only the tests that executed its line (coverage.py with one context
per test function, from ``map``), with ``pytest -x``; a line no in-process test ran
(code run in a child process) runs the area's ``fallback`` files, and a line run only at
import (a module constant) the area's ``tests``.
"""

from __future__ import annotations

import ast
import json
import os
import random
import shutil
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

# the checkout whose code and tests are measured (default: the one holding this script)
ROOT = Path(os.environ.get("MUTATION_ROOT") or Path(__file__).resolve().parents[2])
# the checkout whose tests/ are run (default: ROOT); new tests against a pinned snapshot
TESTS = Path(os.environ.get("MUTATION_TESTS") or ROOT)
WORK = Path(os.environ.get("MUTATION_WORK", "/tmp/benchharness-mutation"))
PY = sys.executable
CR = str(Path(PY).with_name("cosmic-ray"))
AREAS = json.loads((Path(__file__).with_name("areas.json")).read_text())


def _copy_checkout(dest: Path, only_tests: bool = False) -> None:
    """Copy the code from ROOT and the tests from TESTS (the same checkout by default)."""
    for root, tests in ((ROOT, False), (TESTS, True)):
        if only_tests and not tests:
            continue
        files = subprocess.run(["git", "ls-files", "-co", "--exclude-standard"], cwd=root,
                               capture_output=True, text=True, check=True).stdout.split()
        for f in files:
            if f.startswith("tests/") == tests and (root / f).exists():
                (dest / f).parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(root / f, dest / f)


def _nodeid(ctx: str) -> str:
    """coverage's test_function context ``test_x.Class.test_y`` -> a pytest node id."""
    if not ctx:
        return ""
    parts = ctx.split(".")
    mod = next(i for i, p in enumerate(parts) if p.startswith("test_"))
    return "tests/" + "/".join(parts[:mod + 1]) + ".py::" + "::".join(parts[mod + 1:])


def cmd_map(area: str, A: dict, tests: list[str]) -> None:
    copy = WORK / f"cov_{area}"
    shutil.rmtree(copy, ignore_errors=True)
    _copy_checkout(copy)
    rc = WORK / f"{area}.coveragerc"
    rc.write_text("[run]\ndynamic_context = test_function\nsource = benchharness\n")
    data, out = WORK / f"{area}.cov", WORK / f"{area}.cov.json"
    env = dict(os.environ, PYTHONDONTWRITEBYTECODE="1")
    subprocess.run(["nice", "-n", "15", PY, "-m", "coverage", "run", f"--rcfile={rc}",
                    f"--data-file={data}", "-m", "pytest", "-q", "-p", "no:cacheprovider",
                    *(tests or A["tests"])], cwd=copy, env=env)
    subprocess.run([PY, "-m", "coverage", "json", f"--rcfile={rc}", f"--data-file={data}",
                    "--show-contexts", "-o", str(out)], cwd=copy, env=env, check=True)
    path = WORK / f"{area}.map.json"
    mp = json.loads(path.read_text()) if tests and path.exists() else {}
    dpath = WORK / f"{area}.durations.json"
    if mp and not dpath.exists():
        # tests added by this map (times unknown: 0) run before the earlier ones (1 s)
        dpath.write_text(json.dumps({t: 1.0 for d in mp.values() for ts in d.values()
                                     for t in ts if t}))
    for fname, f in json.loads(out.read_text())["files"].items():
        rel = str(Path(fname).resolve().relative_to(copy)) if fname.startswith("/") else fname
        if rel in A["modules"]:
            d = mp.setdefault(rel, {})
            for line, ctxs in f.get("contexts", {}).items():
                d[line] = sorted(set(d.get(line, [])) | {_nodeid(c) for c in ctxs})
    tmp = path.with_suffix(".tmp")
    tmp.write_text(json.dumps(mp))
    os.replace(tmp, path)        # a mutant being run may be reading the map meanwhile
    print({m: len(v) for m, v in mp.items()})


def cmd_durations(area: str, A: dict) -> None:
    """How long each of the area's tests takes (a JUnit XML report): ``select`` runs a
    mutant's tests quickest first, so that with ``-x`` a killed mutant stops early."""
    import xml.etree.ElementTree as ET

    copy = WORK / f"cov_{area}"
    if not copy.exists():
        _copy_checkout(copy)
    xml = WORK / f"{area}.junit.xml"
    subprocess.run(["nice", "-n", "15", PY, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                    f"--junitxml={xml}", *A["tests"]], cwd=copy,
                   env=dict(os.environ, PYTHONDONTWRITEBYTECODE="1"))
    took: dict[str, float] = {}
    for case in ET.parse(xml).iter("testcase"):
        mod = case.get("classname", "").split(".")
        # classname tests.test_x[.Class] -> tests/test_x.py[::Class]
        i = next((k for k, p in enumerate(mod) if p.startswith("test_")), len(mod) - 1)
        node = "/".join(mod[:i + 1]) + ".py" + "".join("::" + p for p in mod[i + 1:])
        node += "::" + case.get("name", "").split("[")[0]
        took[node] = took.get(node, 0.0) + float(case.get("time") or 0)
    (WORK / f"{area}.durations.json").write_text(json.dumps(took, indent=0))
    print(f"{area}: {len(took)} tests, {sum(took.values()):.0f} s in all")


def _annotation_spans(source: str):
    spans = []
    for node in ast.walk(ast.parse(source)):
        anns = []
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            a = node.args
            anns = [node.returns] + [x.annotation for x in
                                     a.posonlyargs + a.args + a.kwonlyargs + [a.vararg, a.kwarg]
                                     if x is not None]
        elif isinstance(node, ast.AnnAssign):
            anns = [node.annotation]
        spans += [((x.lineno, x.col_offset), (x.end_lineno, x.end_col_offset))
                  for x in anns if x is not None]
    return spans


def _function_lines(source: str, names) -> list[list[int]]:
    tree = ast.parse(source)
    for node in ast.walk(tree):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.ClassDef)):
                child.qual = (getattr(node, "qual", "") + "." + child.name).lstrip(".")
    return [[n.lineno, n.end_lineno] for n in ast.walk(tree) if getattr(n, "qual", None) in names]


def cmd_init(area: str, A: dict) -> None:
    copy = WORK / f"cr_{area}"
    shutil.rmtree(copy, ignore_errors=True)
    _copy_checkout(copy)
    orig = WORK / f"orig_{area}"
    shutil.rmtree(orig, ignore_errors=True)
    for m in A["modules"]:
        (orig / m).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(copy / m, orig / m)
    cfg, db = WORK / f"{area}.toml", WORK / f"{area}.sqlite"
    cfg.write_text(f'''[cosmic-ray]
module-path = {json.dumps(A["modules"])}
timeout = {A.get("timeout", 300)}
excluded-modules = []
test-command = "{PY} {Path(__file__).resolve()} select {area}"

[cosmic-ray.distributor]
name = "local"
''')
    db.unlink(missing_ok=True)
    subprocess.run([CR, "init", str(cfg), str(db)], cwd=copy, check=True)
    c = sqlite3.connect(db)
    rows = c.execute("select job_id, module_path, start_pos_row, start_pos_col, operator_name,"
                     " occurrence from mutation_specs").fetchall()
    total = len(rows)
    src = {m: (copy / m).read_text() for m in A["modules"]}
    spans = {m: _annotation_spans(s) for m, s in src.items()}
    rows = [r for r in rows if not any(lo <= (r[2], r[3]) < hi for lo, hi in spans[r[1]])]
    no_ann = len(rows)
    if A.get("functions"):
        ranges = {m: _function_lines(src[m], names) for m, names in A["functions"].items()}
        rows = [r for r in rows if any(lo <= r[2] <= hi for lo, hi in ranges.get(r[1], []))]
    rows.sort(key=lambda r: r[1:])
    n = min(A["sample"], len(rows))
    keep = {r[0] for r in random.Random(A.get("seed", 17)).sample(rows, n)}
    drop = [(j,) for (j,) in c.execute("select job_id from mutation_specs") if j not in keep]
    c.executemany("delete from mutation_specs where job_id = ?", drop)
    c.executemany("delete from work_items where job_id = ?", drop)
    c.commit()
    print(f"{area}: {total} mutants, {total - no_ann} in annotations left out, "
          f"{len(rows)} in scope, sample {n} (seed {A.get('seed', 17)})")


def _enclosing_function_lines(source: str, line: int):
    best = None
    for node in ast.walk(ast.parse("\n".join(source) if isinstance(source, list) else source)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and \
                node.lineno <= line <= node.end_lineno:
            if best is None or node.lineno > best[0]:
                best = (node.lineno, node.end_lineno)
    return best


def _tests_for(cmap_mod, source, line):
    """Tests that ran the line; for a line run only at import (a def with its defaults),
    the tests that ran any line of its function; "all" (the area's tests, which all import
    it) for a line run at import only; None: no in-process test ran it, use the fallback."""
    if str(line) not in cmap_mod:
        return None          # no in-process test ran it: maybe a child process does
    ctx = [c for c in cmap_mod[str(line)] if c]
    if ctx:
        return ctx
    span = _enclosing_function_lines(source, line)
    if span is None:
        return "all"         # run at import only (a module constant): every test imports it
    union = {c for ln in range(span[0], span[1] + 1) for c in cmap_mod.get(str(ln), []) if c}
    return sorted(union) or "all"   # a function run only at import, for a module constant


def cmd_select(area: str, A: dict) -> None:
    """The test command of one mutant (run by cosmic-ray in the area's copy)."""
    orig = WORK / f"orig_{area}"
    mpath = WORK / f"{area}.map.json"
    cmap = json.loads(mpath.read_text()) if mpath.exists() else {}
    tests = A.get("fallback", A["tests"])
    for m in A["modules"]:
        a, b = (orig / m).read_text().splitlines(), Path(m).read_text().splitlines()
        if a != b:
            line = next(i + 1 for i, (x, y) in enumerate(zip(a, b)) if x != y)
            sel = _tests_for(cmap.get(m, {}), a, line)
            if sel == "all":
                tests = A["tests"]
            elif sel:
                tests = sel
                dpath = WORK / f"{area}.durations.json"
                if dpath.exists():   # quickest first: with -x a killed mutant stops early
                    took = json.loads(dpath.read_text())
                    tests = sorted(tests, key=lambda t: took.get(t, 0.0))
            print("mutant at", m, line, "->", len(tests), "test file(s)/test(s)", flush=True)
            with open(WORK / f"{area}.starts.log", "a") as log:  # durations, for planning
                log.write(f"{time.time():.1f} {m} {line} {len(tests)}\n")
            break
    t = str(A.get("test_timeout", A.get("timeout", 300)))
    os.execv("/usr/bin/env", ["env", "PYTHONDONTWRITEBYTECODE=1", "nice", "-n", "15", PY, "-m",
                              "pytest", "-x", "-q", "-p", "no:cacheprovider", f"--timeout={t}",
                              *tests])


def _restore(area: str, A: dict) -> None:
    """Put the area's original modules back in its copy (an interrupted ``exec`` may
    leave a mutant written into one)."""
    for m in A["modules"]:
        shutil.copy2(WORK / f"orig_{area}" / m, WORK / f"cr_{area}" / m)


def _finished(db: Path) -> int:
    with sqlite3.connect(db) as c:
        return c.execute("select count(*) from work_results").fetchone()[0]


def cmd_exec(area: str, A: dict, rerun: bool) -> None:
    """Run the pending mutants (cosmic-ray draws them in random order). With
    ``$MUTATION_BATCH=k`` stop once k more have finished: the next one, just started,
    is stopped and stays pending, so areas can take turns without favouring quick
    mutants."""
    copy = WORK / f"cr_{area}"
    _restore(area, A)
    _copy_checkout(copy, only_tests=True)
    db = WORK / f"{area}.sqlite"
    if rerun:
        first = WORK / f"{area}.pass1.sqlite"
        if not first.exists():
            shutil.copy2(db, first)      # the first pass, in the order it ran
        with open(WORK / f"{area}.passes.log", "a") as log:   # each pass's tally, kept
            log.write(time.strftime("%Y-%m-%dT%H:%M:%SZ ", time.gmtime()))
            log.write(subprocess.run([PY, __file__, "report", area], capture_output=True,
                                     text=True).stdout)
        c = sqlite3.connect(db)
        # mutants the first pass never ran are held back: a rerun is of its survivors only
        c.execute("attach database ? as first", (str(first),))
        ran = "(select job_id from first.work_results)"
        c.execute("create table if not exists held_specs as select * from mutation_specs"
                  " where 0")
        c.execute("create table if not exists held_items as select * from work_items where 0")
        c.execute(f"insert into held_specs select * from mutation_specs where job_id not in {ran}")
        c.execute(f"insert into held_items select * from work_items where job_id not in {ran}")
        c.execute("delete from mutation_specs where job_id in (select job_id from held_specs)")
        c.execute("delete from work_items where job_id in (select job_id from held_items)")
        c.commit()
        c.execute("detach database first")
        eq = _equivalent(area)     # judged equivalent: no test can kill them, not run again
        again = [(j,) for (j, *key) in c.execute(
            "select r.job_id, s.module_path, s.start_pos_row, s.start_pos_col,"
            " s.operator_name, s.occurrence from work_results r join mutation_specs s"
            " using (job_id) where upper(r.test_outcome) = 'SURVIVED'") if tuple(key) not in eq]
        c.executemany("delete from work_results where job_id = ?", again)
        c.commit()
        c.close()
    batch = int(os.environ.get("MUTATION_BATCH") or 0)
    target = _finished(db) + batch
    p = subprocess.Popen(["nice", "-n", "15", CR, "exec", str(WORK / f"{area}.toml"),
                          str(db)], cwd=copy, start_new_session=True)
    try:
        while p.poll() is None:
            if batch and _finished(db) >= target:
                break
            time.sleep(0.5)
    finally:
        if p.poll() is None:
            for pid in [p.pid, *_descendants(p.pid)]:   # cosmic-ray runs tests in their
                try:                                    # own process groups
                    os.killpg(os.getpgid(pid), 15)
                except (ProcessLookupError, PermissionError):
                    pass
            p.wait()
            time.sleep(1)
        _restore(area, A)
        if rerun:
            with sqlite3.connect(db) as c:
                c.execute("insert into work_items select * from held_items")
                c.execute("insert into mutation_specs select * from held_specs")
                c.execute("delete from held_items")
                c.execute("delete from held_specs")


def _descendants(root: int) -> list[int]:
    parent = {}
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                parent[int(d.name)] = int((d / "stat").read_text().rsplit(")", 1)[1].split()[1])
            except (OSError, ValueError, IndexError):
                pass
    out, todo = [], [root]
    while todo:
        pid = todo.pop()
        kids = [q for q, pp in parent.items() if pp == pid]
        out += kids
        todo += kids
    return out


def wilson(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    """The 95% Wilson score interval of a share k/n (Wilson, 1927)."""
    if n == 0:
        return (0.0, 1.0)
    p = k / n
    mid = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z / (1 + z * z / n) * (p * (1 - p) / n + z * z / (4 * n * n)) ** 0.5
    return (max(0.0, mid - half), min(1.0, mid + half))


def _equivalent(area: str) -> dict:
    """Survivors judged equivalent (``equivalent.json``): (module, line, col, operator,
    occurrence) -> why."""
    path = Path(__file__).with_name("equivalent.json")
    rows = json.loads(path.read_text()).get(area, []) if path.exists() else []
    return {(e["module"], e["line"], e["col"], e["operator"], e["occurrence"]): e["why"]
            for e in rows}


def cmd_report(area: str, verbose: bool) -> None:
    c = sqlite3.connect(WORK / f"{area}.sqlite")
    res = c.execute("select s.module_path, s.start_pos_row, s.start_pos_col, s.operator_name,"
                    " s.occurrence, r.test_outcome, r.diff from mutation_specs s"
                    " left join work_results r using (job_id) order by 1, 2, 3").fetchall()
    done = [r for r in res if r[5] is not None]
    out = {k: sum((r[5] or "").lower() == k for r in done) for k in ("killed", "survived")}
    other = len(done) - sum(out.values())
    eq = _equivalent(area)
    n_eq = sum(1 for r in done if (r[5] or "").lower() == "survived" and tuple(r[:5]) in eq)
    line = (f"{area}: {len(res)} sampled, {len(done)} run, {out['killed']} killed, "
            f"{out['survived']} survived ({n_eq} equivalent), {other} incompetent")
    if done:
        lo, hi = wilson(out["killed"], len(done))
        score = out["killed"] / max(1, len(done) - n_eq)
        line += (f"; score {score:.0%}, raw {out['killed'] / len(done):.0%} "
                 f"(95% Wilson {lo:.0%}-{hi:.0%})")
    print(line)
    if verbose:
        for r in done:
            if (r[5] or "").lower() != "killed":
                tag = "equivalent" if tuple(r[:5]) in eq else r[5]
                print("====", r[0], f"{r[1]}:{r[2]}", r[3], f"#{r[4]}", tag)
                print("\n".join(x for x in (r[6] or "").splitlines()
                                if x[:1] in "+-" and x[:3] not in ("---", "+++")))


def cmd_summary(areas: list[str], n: int | None) -> None:
    """One table row per area over ``n`` of the mutants it finished in its first pass: those
    with the smallest job ids. cosmic-ray runs pending mutants in random order and job ids
    are random, so these are a random subsample of the area's sample, whatever their
    outcome (``n``: the fewest any area finished, unless given). Columns: n, killed in the
    first pass, killed now, survived (equivalent), score, raw share with its 95% Wilson
    interval."""
    rows = {}
    for area in areas:
        db = WORK / f"{area}.sqlite"
        first = WORK / f"{area}.pass1.sqlite"
        with sqlite3.connect(first if first.exists() else db) as c:
            # job ids are random (uuid4): their order has nothing to do with the outcome
            order = c.execute("select job_id, test_outcome from work_results"
                              " order by job_id").fetchall()
        with sqlite3.connect(db) as c:
            now = dict(c.execute("select job_id, test_outcome from work_results"))
            key = {j: tuple(k) for j, *k in c.execute(
                "select job_id, module_path, start_pos_row, start_pos_col, operator_name,"
                " occurrence from mutation_specs")}
        rows[area] = (order, now, key)
    if n is None:
        n = min(len(o) for o, _, _ in rows.values())
    print(f"{n} mutants of each area (the smallest job ids among those its first pass ran)")
    print("| area | n | killed, first pass | killed | survived (equivalent) | score "
          "| raw (95% interval) |")
    print("| --- | ---: | ---: | ---: | ---: | ---: | ---: |")
    for area, (order, now, key) in rows.items():
        eq = _equivalent(area)
        take = order[:n]
        k1 = sum((o or "").lower() == "killed" for _, o in take)
        k = sum((now.get(j) or "").lower() == "killed" for j, _ in take)
        surv = [j for j, _ in take if (now.get(j) or "").lower() == "survived"]
        n_eq = sum(key[j] in eq for j in surv)
        lo, hi = wilson(k, len(take))
        print(f"| {area} | {len(take)} | {k1} | {k} | {len(surv)} ({n_eq}) | "
              f"{k / max(1, len(take) - n_eq):.0%} | {k / len(take):.0%} "
              f"({lo:.0%}–{hi:.0%}) |")


def main(argv):
    if argv and argv[0] == "summary":
        WORK.mkdir(parents=True, exist_ok=True)
        n = next((int(a[4:]) for a in argv if a.startswith("--n=")), None)
        cmd_summary([a for a in argv[1:] if not a.startswith("--")], n)
        return
    cmd, area = argv[0], argv[1]
    A = AREAS[area]
    WORK.mkdir(parents=True, exist_ok=True)
    if cmd == "map":
        cmd_map(area, A, argv[2:])
    elif cmd == "init":
        cmd_init(area, A)
    elif cmd == "durations":
        cmd_durations(area, A)
    elif cmd == "select":
        cmd_select(area, A)
    elif cmd in ("exec", "rerun"):
        cmd_exec(area, A, cmd == "rerun")
    elif cmd == "report":
        cmd_report(area, "-v" in argv)
    else:
        raise SystemExit(__doc__)


if __name__ == "__main__":
    main(sys.argv[1:])
