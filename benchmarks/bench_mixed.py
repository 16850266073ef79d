"""Benchmark of the generalised REML fit (random slope, nested sessions) against statsmodels.

Synthetic study: 10 animals × 2 sessions × 2 runs (40 runs); a within-animal condition
with a random slope per animal, a session variance and a run variance; no first-level
variances, so that statsmodels fits the same model. By default (``--design crossed``)
every session holds one run of each condition, so that every component is identified.
``--design session-per-condition`` gives each condition a session of its own (the
layout of earlier measurements): an animal's two session indicators then span the same
columns as its intercept and slope, the session variance cannot be told apart from the
animal covariance matrix (a flat ridge of the likelihood), and where a fit ends on the
ridge is arbitrary.

Prints our whole-fit wall time and the per-voxel time ratio against
statsmodels ``MixedLM`` (REML, ``re_formula="1 + condition"``,
``vc_formula={"session": "0 + C(session)"}``) timed on a few voxels in the same run,
and the largest differences between the two fits on those voxels.

Run with ``.venv/bin/python benchmarks/bench_mixed.py`` (100 000 voxels) or with
``--tiny`` (a few hundred voxels and three statsmodels fits; seconds).
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
import pandas as pd
from statsmodels.regression.mixed_linear_model import MixedLM

from grouplevel.model.mixed import fit_mixed

N_ANIMALS = 10
SESSIONS_PER_ANIMAL = 2
RUNS_PER_SESSION = 2


DESIGNS = ("crossed", "session-per-condition")


def make_data(n_vox: int, rng: np.random.Generator, design: str = "crossed"):
    runs = SESSIONS_PER_ANIMAL * RUNS_PER_SESSION
    animal = np.repeat(np.arange(N_ANIMALS), runs)
    session = np.repeat(np.arange(N_ANIMALS * SESSIONS_PER_ANIMAL), RUNS_PER_SESSION)
    if design == "crossed":  # runs alternate between the conditions inside every session
        within = np.arange(RUNS_PER_SESSION) % 2 - 0.5
        condition = np.tile(within, N_ANIMALS * SESSIONS_PER_ANIMAL)
    else:  # all runs of a session in one condition, one session per condition
        per_session = np.arange(SESSIONS_PER_ANIMAL) % 2 - 0.5
        condition = np.tile(np.repeat(per_session, RUNS_PER_SESSION), N_ANIMALS)
    n = animal.size
    X = np.column_stack([np.ones(n), condition])
    u0 = rng.normal(size=(N_ANIMALS, n_vox))
    u1 = rng.normal(size=(N_ANIMALS, n_vox)) * rng.uniform(0.3, 1.2, n_vox)
    w = rng.normal(size=(session.max() + 1, n_vox)) * 0.5
    y = 0.2 + u0[animal] + condition[:, None] * u1[animal] + w[session]
    y += rng.normal(size=(n, n_vox)) * 0.7
    return y, X, animal, session, condition


def statsmodels_fit(y, animal, session, condition):
    df = pd.DataFrame({"y": y, "animal": animal, "session": session, "condition": condition})
    model = MixedLM.from_formula(
        "y ~ condition",
        df,
        groups="animal",
        re_formula="1 + condition",
        vc_formula={"session": "0 + C(session)"},
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return model.fit(reml=True)


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--voxels", type=int, default=100_000)
    parser.add_argument("--reference-voxels", type=int, default=20)
    parser.add_argument("--tiny", action="store_true", help="a few hundred voxels")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--design", choices=DESIGNS, default=DESIGNS[0])
    args = parser.parse_args(argv)
    n_vox, n_ref = (300, 3) if args.tiny else (args.voxels, args.reference_voxels)
    rng = np.random.default_rng(args.seed)
    y, X, animal, session, condition = make_data(n_vox, rng, args.design)
    kwargs = {"slopes": condition, "slope_names": ["condition"], "session": session}

    fit_mixed(y[:, :8], None, X, animal, **kwargs)  # compile (or load) the small kernel
    t0, c0 = time.perf_counter(), time.process_time()
    fit = fit_mixed(y, None, X, animal, **kwargs)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    ours_per_voxel = wall / n_vox

    columns = rng.choice(n_vox, size=n_ref, replace=False)
    t0, c0 = time.perf_counter(), time.process_time()
    refs = [statsmodels_fit(y[:, v], animal, session, condition) for v in columns]
    sm_per_voxel = (time.perf_counter() - t0) / n_ref
    sm_cpu_per_voxel = (time.process_time() - c0) / n_ref

    d_beta = max(
        np.max(np.abs(fit.beta[v] - r.fe_params.to_numpy()))
        for v, r in zip(columns, refs, strict=True)
    )
    d_ll = max(r.llf - fit.loglik[v] for v, r in zip(columns, refs, strict=True))
    print(
        f"voxels: {n_vox}, runs: {y.shape[0]} ({N_ANIMALS} animals x "
        f"{SESSIONS_PER_ANIMAL} sessions x {RUNS_PER_SESSION} runs; design {args.design})"
    )
    print(f"variance components: {', '.join(fit.component_names)}")
    print(
        f"our fit: {wall:.2f} s wall ({1e6 * ours_per_voxel:.1f} us per voxel), "
        f"converged {fit.converged.mean():.4f}, mean iterations {fit.n_iter.mean():.2f}"
    )
    print(f"statsmodels MixedLM: {1e3 * sm_per_voxel:.1f} ms per voxel ({n_ref} voxels)")
    print(f"per-voxel speed ratio (statsmodels / ours): {sm_per_voxel / ours_per_voxel:.0f}x")
    print(
        f"same ratio in CPU time (process_time; robust to a busy machine): "
        f"{sm_cpu_per_voxel / (cpu / n_vox):.0f}x (ours {cpu:.2f} s CPU)"
    )
    print(
        f"on those voxels: max |beta difference| {d_beta:.2e}; "
        f"max (statsmodels loglik - ours) {d_ll:.2e} (<= 0: ours at least as high)"
    )


if __name__ == "__main__":
    main()
