"""Instance leakage: an object instance declared unseen in a test split that training used."""

from __future__ import annotations

import numpy as np
import pandas as pd

from .result import FAIL, PASS, CheckResult, top_rows


def check_instances(train_class, train_instance, test_class, test_instance, test_seen,
                    train_seen=None, train_ids=None, test_ids=None,
                    pair: tuple[str, str] | None = None, worst_k: int = 20) -> CheckResult:
    """Fail when a (class, instance) that a test row declares unseen occurs among train rows,
    or when a train row itself carries an instance flagged unseen."""
    tr = pd.DataFrame({"c": np.asarray(train_class, object), "i": np.asarray(train_instance)})
    te = pd.DataFrame({"c": np.asarray(test_class, object), "i": np.asarray(test_instance),
                       "seen": np.asarray(test_seen, dtype=bool)})
    train_ids = np.arange(len(tr)) if train_ids is None else np.asarray(train_ids)
    test_ids = np.arange(len(te)) if test_ids is None else np.asarray(test_ids)
    train_keys = pd.MultiIndex.from_frame(tr[["c", "i"]].drop_duplicates())
    test_keys = pd.MultiIndex.from_frame(te[["c", "i"]])
    in_train = test_keys.isin(train_keys)
    leaked = (~te["seen"].to_numpy()) & in_train
    unseen_pairs = te.loc[~te["seen"], ["c", "i"]].drop_duplicates()
    leaked_pairs = te.loc[leaked, ["c", "i"]].drop_duplicates()
    bad_train = np.zeros(len(tr), bool) if train_seen is None else ~np.asarray(train_seen, dtype=bool)
    numbers = {
        "n_unseen_instances": int(len(unseen_pairs)),
        "n_test_rows_unseen": int((~te["seen"]).sum()),
        "n_leaked_instances": int(len(leaked_pairs)),
        "n_leaked_test_rows": int(leaked.sum()),
        "n_train_rows_flagged_unseen": int(bad_train.sum()),
        "leaked": [{"class": str(c), "instance": _plain(i)} for c, i in leaked_pairs.itertuples(index=False)],
    }
    # the first train row of each leaked instance, to name the evidence
    first_train = tr.reset_index().drop_duplicates(["c", "i"]).set_index(["c", "i"])["index"]
    rows = np.flatnonzero(leaked)
    tr_rows = first_train.reindex(pd.MultiIndex.from_frame(te.loc[leaked, ["c", "i"]])).to_numpy() if len(rows) else np.zeros(0, int)
    frame = pd.DataFrame({"test_row": rows, "test_id": test_ids[rows], "class": te["c"].to_numpy()[rows],
                          "instance": te["i"].to_numpy()[rows], "train_row": tr_rows.astype(np.int64),
                          "train_id": train_ids[tr_rows.astype(np.int64)] if len(rows) else []})
    worst = top_rows(frame, "test_row", worst_k, ascending=True)
    if leaked.any() or bad_train.any():
        parts = []
        if leaked.any():
            names = ", ".join(f"{d['class']}#{d['instance']}" for d in numbers["leaked"][:5])
            parts.append(f"{len(leaked_pairs)} instance(s) declared unseen appear in training ({names})")
        if bad_train.any():
            parts.append(f"{int(bad_train.sum())} train rows carry an instance flagged unseen")
        return CheckResult("instance_leakage", FAIL, numbers, worst, "; ".join(parts), pair)
    detail = (f"none of the {len(unseen_pairs)} unseen instance(s) appears in training"
              if len(unseen_pairs) else "no test row declares an unseen instance")
    return CheckResult("instance_leakage", PASS, numbers, worst, detail, pair)


def _plain(v):
    return v.item() if hasattr(v, "item") else v
