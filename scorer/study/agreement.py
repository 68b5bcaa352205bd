"""Reader agreement: inter-reader (Fleiss' kappa, pairwise Cohen's kappa) and intra-reader
(Cohen's kappa between repeated readings of the same trial).

Kappa values are computed by statsmodels (``statsmodels.stats.inter_rater``) from
contingency and count tables built here from the tidy trial table; every figure is
reported with the counts it rests on.

References
----------
.. [1] Cohen, J. "A coefficient of agreement for nominal scales", Educational and
       Psychological Measurement 20 (1960).
.. [2] Fleiss, J. L. "Measuring nominal scale agreement among many raters",
       Psychological Bulletin 76 (1971).
"""

from __future__ import annotations

from itertools import combinations

import numpy as np
import pandas as pd


def cohen_kappa_table(a, b, categories=None) -> dict:
    """Cohen's kappa of two paired label sequences (statsmodels ``cohens_kappa`` on their crosstab).

    Returns kappa, its standard error and 95 % CI (statsmodels), observed agreement,
    chance agreement, the number of pairs and the contingency table.
    """
    from statsmodels.stats.inter_rater import cohens_kappa

    a = np.asarray(a).astype(str)
    b = np.asarray(b).astype(str)
    cats = sorted(set(a) | set(b)) if categories is None else [str(c) for c in categories]
    index = {c: i for i, c in enumerate(cats)}
    ia = np.array([index[x] for x in a], dtype=np.int64)
    ib = np.array([index[x] for x in b], dtype=np.int64)
    table = np.bincount(ia * len(cats) + ib, minlength=len(cats) ** 2).reshape(len(cats), len(cats)).astype(float)
    n = float(table.sum())
    po = float(np.trace(table) / n) if n else float("nan")
    pe = float(table.sum(1) @ table.sum(0) / n**2) if n else float("nan")
    out = {
        "n_pairs": int(n),
        "observed_agreement": po,
        "chance_agreement": pe,
        "categories": cats,
        "table": table.astype(int).tolist(),
    }
    if n == 0 or pe >= 1.0:
        out.update(
            kappa=None,
            se=None,
            ci_low=None,
            ci_high=None,
            note="kappa undefined: chance agreement is 1 (one category only)" if n else "no pairs",
        )
        return out
    res = cohens_kappa(table)
    out.update(
        kappa=float(res.kappa),
        se=float(res.std_kappa),
        ci_low=float(res.kappa_low),
        ci_high=float(res.kappa_upp),
        note="",
    )
    return out


def fleiss_kappa_items(labels: pd.DataFrame) -> dict:
    """Fleiss' kappa for a subjects × raters table of category labels (statsmodels)."""
    from statsmodels.stats.inter_rater import aggregate_raters, fleiss_kappa

    codes, cats = pd.factorize(pd.Series(labels.to_numpy().ravel()).astype(str), sort=True)
    codes = codes.reshape(labels.shape)
    counts, _ = aggregate_raters(codes, n_cat=len(cats))
    out = {"n_items": int(labels.shape[0]), "n_raters": int(labels.shape[1]), "n_categories": int(len(cats))}
    if len(cats) < 2:
        out.update(kappa=None, note="kappa undefined: every rating is the same")
        return out
    out.update(kappa=float(fleiss_kappa(counts, method="fleiss")), note="")
    return out


def _first_reading(df: pd.DataFrame) -> pd.DataFrame:
    if "repeat" in df.columns:
        first = df.groupby("reader")["repeat"].transform("min")
        return df[df["repeat"] == first]
    return df


def inter_reader_agreement(df: pd.DataFrame, by: str = "detector") -> dict:
    """Agreement between readers on the trials all of them read (first reading of each).

    Fleiss' kappa on the chosen site and on correct/incorrect; mean, min and max of
    pairwise Cohen's kappa on correct/incorrect.  Items = (group, image, target).
    """
    d = _first_reading(df)
    readers = sorted(d["reader"].unique())
    if len(readers) < 2:
        return {"note": "inter-reader agreement needs at least 2 readers", "n_readers": len(readers)}
    keys = [by, "image", "target"]
    d = d.drop_duplicates(keys + ["reader"])
    wide_site = d.pivot_table(index=keys, columns="reader", values="chosen_site", aggfunc="first")
    wide_corr = d.pivot_table(index=keys, columns="reader", values="correct", aggfunc="first")
    complete = wide_site.notna().all(axis=1)
    wide_site, wide_corr = wide_site[complete], wide_corr[complete]
    n_items = int(complete.sum())
    out = {"n_readers": len(readers), "n_items": n_items, "n_items_dropped": int((~complete).sum())}
    if n_items < 2:
        out["note"] = "too few trials read by every reader for inter-reader agreement"
        return out
    out["fleiss_chosen_site"] = fleiss_kappa_items(wide_site)
    out["fleiss_correct"] = fleiss_kappa_items(wide_corr.astype(int))
    pair_k = []
    for r1, r2 in combinations(readers, 2):
        k = cohen_kappa_table(wide_corr[r1].astype(int), wide_corr[r2].astype(int), categories=[0, 1])["kappa"]
        if k is not None:
            pair_k.append(k)
    out["pairwise_cohen_correct"] = (
        {
            "n_pairs_of_readers": len(pair_k),
            "mean": float(np.mean(pair_k)),
            "min": float(np.min(pair_k)),
            "max": float(np.max(pair_k)),
        }
        if pair_k
        else None
    )
    out["note"] = ""
    return out


def intra_reader_agreement(df: pd.DataFrame, by: str = "detector") -> dict:
    """Agreement of each reader with themself on repeated readings (first two repeats).

    Cohen's kappa on the chosen site between repeat r₀ and r₁ of the same (group, image,
    target), per reader, with the number of pairs and the proportion of identical choices.
    """
    if "repeat" not in df.columns:
        return {"note": "no repeat column: intra-reader agreement not estimated", "per_reader": []}
    per = []
    keys = [by, "image", "target"]
    for reader, g in df.groupby("reader", sort=True):
        reps = sorted(g["repeat"].unique())
        if len(reps) < 2:
            continue
        a = g[g["repeat"] == reps[0]].drop_duplicates(keys).set_index(keys)["chosen_site"]
        b = g[g["repeat"] == reps[1]].drop_duplicates(keys).set_index(keys)["chosen_site"]
        both = a.index.intersection(b.index)
        if len(both) < 2:
            continue
        res = cohen_kappa_table(a.loc[both], b.loc[both])
        per.append(
            {
                "reader": reader,
                "repeats": [int(reps[0]), int(reps[1])],
                "n_pairs": res["n_pairs"],
                "observed_agreement": res["observed_agreement"],
                "kappa": res["kappa"],
                "se": res["se"],
                "ci_low": res["ci_low"],
                "ci_high": res["ci_high"],
            }
        )
    if not per:
        return {
            "note": "no trial was read twice by the same reader: intra-reader agreement not estimated",
            "per_reader": [],
        }
    ks = [r["kappa"] for r in per if r["kappa"] is not None]
    return {
        "per_reader": per,
        "n_readers": len(per),
        "mean_kappa": float(np.mean(ks)) if ks else None,
        "n_pairs_total": int(sum(r["n_pairs"] for r in per)),
        "note": "",
    }


def agreement_summary(df: pd.DataFrame, by: str = "detector") -> dict:
    """Both agreement analyses plus the notes explaining anything not estimated."""
    inter = inter_reader_agreement(df, by)
    intra = intra_reader_agreement(df, by)
    notes = [x["note"] for x in (inter, intra) if x.get("note")]
    return {"inter_reader": inter, "intra_reader": intra, "notes": notes}
