"""Writes demo-data/parcel-late-week1.csv: one week of labelled predictions from the demo
scenario, a fictional parcel-delivery company whose classifier predicts "will this parcel arrive
late". Invented data, for the demo only (seeded, so the file is reproducible). The north-east
region is deliberately worse than the others so that grouping shows a difference.
Run: python3 demo-data/make_demo_batch.py   (standard library only)"""
import csv
import os
import random

rng = random.Random(20261201)
REGIONS = [("north", 0.06), ("south", 0.07), ("west", 0.05), ("north-east", 0.16)]
CARRIERS = ["carrier-amber", "carrier-birch", "carrier-cobalt"]
path = os.path.join(os.path.dirname(os.path.abspath(__file__)), "parcel-late-week1.csv")
with open(path, "w", newline="") as f:
    w = csv.writer(f)
    w.writerow(["request_id", "ts", "region", "carrier", "weight_kg", "predicted", "outcome"])
    t0 = 1_795_000_000
    for i in range(4000):
        region, err = REGIONS[rng.randrange(len(REGIONS))]
        outcome = "late" if rng.random() < 0.3 else "on-time"
        wrong = rng.random() < err
        predicted = ("on-time" if outcome == "late" else "late") if wrong else outcome
        w.writerow([f"r{i:06d}", t0 + 150 * i, region, rng.choice(CARRIERS), round(rng.uniform(0.2, 30.0), 1),
                    predicted, outcome])
print("wrote", path)
