"""False alarms and catch rates of the near-duplicate check (not a timing benchmark).

Clean datasets: every config in configs/, the built-in demo and N random clean specs
(tests/lookalikes.py), generated in-process. Each is audited as `augsplit audit DIR` does
(the render judge), and again as a plain table without the renderer (the pixel null). Then
leaks are planted in a copy (a train image copied, shifted 1 px, re-encoded as JPEG, made
8 % brighter, written over test images) and the check must fail and name the source.

    python tests/bench/bench_lookalikes.py [--random 60] [--per-kind 3] [--jpeg]

Prints, per judge: clean datasets with a near-duplicate FAIL, and leaks named per kind.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.sidebyside import aim  # noqa: E402
from lookalikes import LEAKS, make, named, plant, random_spec  # noqa: E402

from augsplit.audit import run_audit  # noqa: E402
from augsplit.audit.entry import audit_dataset  # noqa: E402
from augsplit.dataset import open_dataset  # noqa: E402
from augsplit.generate import Options, generate  # noqa: E402
from augsplit.spec import builtin_spec_path  # noqa: E402

FAST = {"worst_k": 100000, "thumbnails": 0, "category_pairs": 50}


def by_render(root):
    return audit_dataset(root, thresholds=FAST)


def by_pixels(root):
    plan = open_dataset(root).built.plan
    axes = {n: plan.space[n] for n in plan.space.names if n != "class"}
    pairs = [(plan.splits[0].name, s.name) for s in plan.splits[1:]]
    return run_audit(root, axes, pairs=pairs, thresholds=FAST)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--random", type=int, default=60, help="random clean specs")
    ap.add_argument("--per-kind", type=int, default=3, help="leaks of each kind planted per dataset")
    ap.add_argument("--jpeg", action="store_true", help="store images as JPEG (quality 90)")
    a = ap.parse_args()
    tmp = Path(tempfile.mkdtemp(prefix="lookalikes-"))
    root_dir = Path(__file__).resolve().parents[2]
    store = {"format": "jpeg", "quality": 90} if a.jpeg else {}
    datasets = []
    for spec in sorted((root_dir / "configs").glob("*.yaml")) + [builtin_spec_path("demo")]:
        out = tmp / f"cfg-{spec.stem}"
        generate(spec, out, Options(progress=False, **store))
        datasets.append((spec.stem, out))
    for seed in range(a.random):
        datasets.append((f"random-{seed}", make(random_spec(seed), tmp / f"random-{seed}", **store)))
    judges = {"render": by_render, "pixels": by_pixels}
    alarms = {j: [] for j in judges}
    caught = {j: {k: [0, 0] for k in LEAKS} for j in judges}
    for k, (name, out) in enumerate(datasets):
        leaky = tmp / f"{name}-leaky"
        planted = plant(out, leaky, list(LEAKS), per_kind=a.per_kind, seed=k)
        for j, audit in judges.items():
            if any(c.verdict == "fail" for c in audit(out).checks if c.name == "near_duplicates"):
                alarms[j].append(name)
            for kind, hits in named(audit(leaky), planted).items():
                caught[j][kind][0] += sum(hits)
                caught[j][kind][1] += len(hits)
        print(f"{name}: done", flush=True)
    print(f"\n{len(datasets)} clean datasets ({len(datasets) - a.random} shipped specs, {a.random} random), "
          f"store {'jpeg' if a.jpeg else 'png'}")
    for j in judges:
        rates = ", ".join(f"{kind} {c}/{n}" for kind, (c, n) in caught[j].items())
        print(f"{j:>7}: near-duplicate FAIL on {len(alarms[j])} clean datasets {alarms[j] or ''}; "
              f"leaks named: {rates}")
    store = "JPEG" if a.jpeg else "PNG"
    aim(f"no near-duplicate false alarm on clean {store} datasets (render judge, the default)",
        f"{len(alarms['render'])} of {len(datasets)}", not alarms["render"])
    got, total = (sum(caught["render"][k][i] for k in LEAKS) for i in (0, 1))
    aim(f"every planted leak named ({store}, render judge)", f"{got} of {total}", got == total)


if __name__ == "__main__":
    main()
