"""What each ranking rule prefers on Citeseer's pool (tests/data/citeseer/, pool protocol):
mean degree, PageRank and label homophily of each fifth of the rule's ranking of the 1,812
pool papers, beside the whole pool, from the select report's ``preference`` (seeded rules:
mean over seeds).

    python3 scripts/citeseer_preferences.py
    python3 scripts/citeseer_preferences.py --rules degree,el2n --seeds 2
"""
import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

import bigprune  # noqa: E402
from citeseer_protocol import SEEDED  # noqa: E402
from conftest import build_citeseer  # noqa: E402

RANKING_RULES = "degree,pagerank,entropy,el2n,age,ddd,influence,random"
MEASURES = {"degree": "degree", "pagerank": "PageRank", "homophily": "homophily"}


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter,
                                     epilog=__doc__.split("\n\n", 1)[1])
    parser.add_argument("--rules", default=RANKING_RULES, help=f"ranking rules (default: {RANKING_RULES})")
    parser.add_argument("--seeds", type=int, default=5, help="seeds for seeded rules (default 5)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="citeseer-") as tmp:
        store, _ = build_citeseer(Path(tmp), "pool")
        print("| rule | measure | top 20 % | 20-40 % | 40-60 % | 60-80 % | 80-100 % | pool |")
        print("|---" * 8 + "|")
        for rule in args.rules.split(","):
            profiles = [bigprune.select(store, rule, 30, seed=seed)["preference"]
                        for seed in range(args.seeds if rule in SEEDED else 1)]
            pool = profiles[0]["pool"]
            for name, title in MEASURES.items():
                fifths = [np.mean([p["parts"][i][name] for p in profiles]) for i in range(5)]
                print(f"| {rule} | {title} | " + " | ".join(f"{v:.4g}" for v in fifths)
                      + f" | {pool[name]:.4g} |", flush=True)


if __name__ == "__main__":
    main()
