"""The same work as `cargo bench --bench microdata`, in pandas + statsmodels, for comparison.

`cargo bench --bench microdata` runs it on its data file and prints the ratio; or by hand,
after the Rust benchmark has written its data file:
    python3 benches/pandas_reference.py [PATH]   (default: $CARGO_TARGET_DIR or target, /bench-microdata-2m.csv)
Needs pandas, numpy and statsmodels (PyPI). Not part of the tests.
"""
import os
import resource
import sys
import time

import numpy as np
import pandas as pd
import statsmodels.api as sm

path = sys.argv[1] if len(sys.argv) > 1 else os.path.join(os.environ.get("CARGO_TARGET_DIR", "target"), "bench-microdata-2m.csv")
predictors = ["age", "female", "education", "income", "urban", "interest"]

cpu_start = time.process_time()
start = time.perf_counter()
frame = pd.read_csv(path)
read_s = time.perf_counter() - start

start = time.perf_counter()
codes, countries = pd.factorize(frame["country"])
# The same country weights as the Rust benchmark (countries in order of first appearance).
country_weight = 0.5 + ((np.arange(len(countries)) * 37) % 60) / 60
totals = frame.groupby(codes)["design_weight"].transform("sum").to_numpy()
weight = country_weight[codes] * frame["design_weight"].to_numpy() / totals
weight_s = time.perf_counter() - start

start = time.perf_counter()
X = sm.add_constant(frame[predictors].astype(float))
model = sm.GLM(frame["voted"].astype(float), X, family=sm.families.Binomial(), var_weights=weight)
fit = model.fit(cov_type="cluster", cov_kwds={"groups": codes})
fit_s = time.perf_counter() - start

peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(f"pandas read: {read_s:.2f} s; weights: {weight_s:.3f} s; statsmodels GLM with clustered errors: {fit_s:.2f} s")
cpu_s = time.process_time() - cpu_start
print(f"total: {read_s + weight_s + fit_s:.2f} s; peak memory: {peak_mb:.0f} MB; processor time: {cpu_s:.2f} s")
print("coefficients:", np.round(fit.params.to_numpy(), 4).tolist())
