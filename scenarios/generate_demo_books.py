"""Regenerate the invented demo books in this folder (fixed seed; figures are fictional).

Run: python scenarios/generate_demo_books.py
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import yaml

HERE = Path(__file__).parent
SECTORS = ["agriculture", "retail", "construction", "energy", "manufacturing", "shipping"]
SYLLABLES = ["brac", "cwen", "dorl", "evro", "fenk", "gral", "hobb", "isk", "jund", "kev", "lorr",
             "mirk", "nask", "orv", "plon", "quar", "rask", "stel", "tuv", "ulk", "vadd", "wess"]
KINDS = ["Farms", "Mills", "Haulage", "Builders", "Foods", "Energy", "Supplies", "Works",
         "Traders", "Dairy", "Timber", "Metals"]


def firm_name(rng: np.random.Generator) -> str:
    """Return an invented two-syllable firm name."""
    first = "".join(rng.choice(SYLLABLES, size=2)).capitalize()
    return f"{first} {rng.choice(KINDS)}"


def rating_pd(rng: np.random.Generator, size: int) -> np.ndarray:
    """Draw PDs from an invented rating-grade mix."""
    grades = np.array([0.0005, 0.001, 0.002, 0.004, 0.008, 0.015, 0.03, 0.06, 0.12])
    weights = np.array([0.04, 0.08, 0.14, 0.2, 0.2, 0.15, 0.1, 0.06, 0.03])
    return rng.choice(grades, size=size, p=weights / weights.sum())


def basel_correlation(pd: np.ndarray) -> np.ndarray:
    """Corporate IRB correlation (Basel II, June 2006), rounded to 4 places."""
    w = (1 - np.exp(-50 * pd)) / (1 - np.exp(-50))
    return np.round(0.12 * w + 0.24 * (1 - w), 4)


def clustered_links(rng, ids, cluster_sizes, cycle_share):
    """Links inside small supply-chain clusters; some clusters hold a lending cycle."""
    links = []
    start = 0
    for size in cluster_sizes:
        members = ids[start : start + size]
        start += size
        if size < 2:
            continue
        for k in range(1, size):  # a tree: each firm owes one earlier firm
            creditor = members[int(rng.integers(0, k))]
            links.append((creditor, members[k]))
        if size >= 3 and rng.random() < cycle_share:  # close a loop: the first firm owes the last
            links.append((members[-1], members[0]))
        elif size >= 2 and rng.random() < cycle_share:
            links.append((members[1], members[0]))
    seen = set()
    out = []
    for c, d in links:
        if c != d and (c, d) not in seen:
            seen.add((c, d))
            out.append({"creditor": c, "debtor": d,
                        "contagion": float(np.round(rng.uniform(0.05, 0.45), 2)),
                        "amount": float(np.round(rng.lognormal(11.5, 0.8), -3))})
    return out


def grain_coop() -> None:
    """Write the mid-size demo book with lending cycles."""
    rng = np.random.default_rng(20261202)
    n = 60
    ids = [f"GC{i:03d}" for i in range(1, n + 1)]
    pd = rating_pd(rng, n)
    obligors = [
        {"id": ids[i], "name": firm_name(rng), "sector": str(rng.choice(SECTORS[:4])),
         "ead": float(np.round(rng.lognormal(13.0, 0.9), -3)), "pd": float(pd[i]),
         "lgd": float(np.round(rng.uniform(0.3, 0.6), 2)),
         "asset_correlation": float(basel_correlation(pd[i:i + 1])[0])}
        for i in range(n)
    ]
    sizes = [6, 5, 5, 4, 4, 4, 3, 3, 3, 3, 2, 2, 2, 2] + [1] * 12
    links = clustered_links(rng, ids, sizes, cycle_share=0.6)
    book = {"book": "Corvask Valley Grain Cooperative Bank - members' book", "currency": "EUR",
            "obligors": obligors, "links": links, "model": {"factor_qubits": 5}}
    header = "# Demo book (invented firms and figures): mid-size, with lending cycles.\n"
    (HERE / "grain_coop.yaml").write_text(header + yaml.safe_dump(book, sort_keys=False))


def grain_coop_sectors() -> None:
    """Write the grain_coop book with sector loadings (a new demo; grain_coop.yaml is unchanged).

    Same obligors, figures and links; each group of obligors joined by links
    is put in the trade of its first member, so link groups stay inside one
    sector (the exact engine then conditions each sector on its own factor).
    """
    book = yaml.safe_load((HERE / "grain_coop.yaml").read_text())
    sector = {o["id"]: o["sector"] for o in book["obligors"]}
    parent = {i: i for i in sector}

    def find(x: str) -> str:
        while parent[x] != x:
            x = parent[x]
        return x

    for lk in book["links"]:
        parent[find(lk["creditor"])] = find(lk["debtor"])
    for o in book["obligors"]:
        o["sector"] = sector[find(o["id"])]
    book["book"] = "Upland Grain Cooperative Bank - members' book, by trade"
    book["model"] = {
        "factor_qubits": 5,
        "sectors": {
            "agriculture": {"loading": 0.85},
            "construction": {"loading": 0.6},
            "energy": {"loading": 0.55},
            "retail": {"loading": 0.5},
        },
    }
    header = (
        "# Demo book (invented firms and figures): grain_coop with sector factors;\n"
        "# each lending group sits in one trade.\n"
    )
    (HERE / "grain_coop_sectors.yaml").write_text(header + yaml.safe_dump(book, sort_keys=False))


def regional_bank() -> None:
    """Write the 3,000-loan CSV demo book."""
    rng = np.random.default_rng(7)
    n = 3000
    ids = [f"RB{i:05d}" for i in range(1, n + 1)]
    pd = rating_pd(rng, n)
    folder = HERE / "regional_bank"
    folder.mkdir(exist_ok=True)
    with open(folder / "obligors.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["id", "name", "sector", "ead", "pd", "lgd", "asset_correlation"])
        for i in range(n):
            w.writerow([ids[i], firm_name(rng), rng.choice(SECTORS),
                        f"{np.round(rng.lognormal(12.2, 1.1), -2):.0f}", pd[i],
                        f"{rng.choice([0.25, 0.35, 0.45, 0.45, 0.45, 0.6]):.2f}",
                        basel_correlation(pd[i:i + 1])[0]])
    sizes = list(rng.integers(2, 9, size=150))
    links = clustered_links(rng, ids, sizes, cycle_share=0.3)
    with open(folder / "links.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["creditor", "debtor", "contagion", "amount"])
        for lk in links:
            w.writerow([lk["creditor"], lk["debtor"], lk["contagion"], f"{lk['amount']:.0f}"])
    (HERE / "regional_bank.yaml").write_text(
        "# Demo book (invented firms and figures): 3,000 business loans read from CSV.\n"
        "book: Quenmoor Savings Bank - business lending\n"
        "currency: GBP\n"
        "obligors: regional_bank/obligors.csv\n"
        "links: regional_bank/links.csv\n"
    )


if __name__ == "__main__":
    grain_coop()
    grain_coop_sectors()
    regional_bank()
