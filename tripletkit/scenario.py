"""The invented demo scenario, a grey seal re-identification survey: its generator and ``tripletkit demo``.

A coastal wildlife survey photographs grey seals at five haul-out sites over four seasons and
re-identifies individuals from their coat patterns. Everything here is invented: the sites, the
seals and the photos are draws from one seeded random model (numpy), not data of real animals;
demo_data/README.md describes the scenario and its deliberate defects. Each individual has a
latent identity (one in seven a look-alike relative of an earlier one); each photo adds nuisance
(pose, light, site, season) along directions shared by all individuals, so a linear projection
head can learn to suppress it. A frozen backbone mixes both into raw features, and a partially
trained model removes part of the nuisance and projects to unit embeddings. :func:`demo` runs the
package's loop (check, mine, loss, score, sweep) on the tables.

All values are computed in float64 and rounded to a binary grid that float32 holds exactly
(features to 2**-12, embeddings to 2**-20) before they are stored, and the Parquet writer options
are fixed with no timestamp: the same seed, numpy and pyarrow versions give the same bytes,
whatever the last bits of a BLAS kernel.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ._errors import TripletkitError
from ._io import PARQUET_WRITE, atomic_path, check_not_input, check_output, jsonable, say

__all__ = ["DEFAULT_SEED", "DEMO_FILES", "SITES", "SEASONS", "FEATURE_DIM", "EMBEDDING_DIM", "generate", "demo_paths",
           "demo", "main"]

DEFAULT_SEED = 20240917

#: Keys of the dicts returned by :func:`generate` and :func:`demo_paths`, and the file names.
DEMO_FILES = {
    "train_embeddings": "train_embeddings.parquet",
    "heldout_embeddings": "heldout_embeddings.parquet",
    "train_features": "train_features.parquet",
    "heldout_features": "heldout_features.parquet",
}

#: Invented haul-out sites (slug used in the table, relative difficulty). The difficulty scales
#: the pose/light spread and the photo noise at that site (a rocky reef photographed from a boat
#: is harder than a sandy beach), so that per-group error rates differ, as in a real survey.
SITES = (("skarth-point", 1.0), ("vellin-sands", 0.8), ("orrisey-reef", 1.45), ("brennock-bay", 1.0),
         ("caddow-skerry", 1.2))
SEASONS = ("spring", "summer", "autumn", "winter")

FEATURE_DIM = 64
EMBEDDING_DIM = 32

# Scenario sizes and scales. Chosen so that the whole demo loop (mine, score with bootstrap, a
# fit-head sweep of a few margins) stays well under two minutes on two cores, and so that the raw
# features have a held-out EER of about 20 %, the dumped embeddings about 10 %, and a linear map
# that removes the shared nuisance (LDA, as a reference) about 3 %.
_N_TRAIN, _N_HELDOUT = 300, 100  # individuals
_N_TRAIN_SINGLETONS, _N_DUPLICATE_SEALS = 5, 2  # the deliberate defects of the training dump
_PHOTOS_MIN, _PHOTOS_EXTRA_MEAN = 3, 10  # photos per individual: 3 + Poisson(10)
_ID_DIM, _NUISANCE_DIM, _POSE_DIM, _LIGHT_DIM, _OWN_DIM = 16, 12, 3, 2, 3  # latent dimensions
_KIN_FRACTION, _KIN_CORRELATION = 0.15, 0.8  # look-alike relatives
_HOME_SITE_FRACTION = 0.75  # photos taken at the individual's home site
_SITE_SPREAD, _SEASON_SPREAD = 1.0, 0.7  # spread of the site and season offsets
_POSE_SCALE, _LIGHT_SCALE, _OTHER_NUISANCE_SCALE = 1.0, 1.0, 0.8  # per-photo nuisance
_OWN_SCALE, _NOISE_SCALE = 1.0, 0.35  # individual-specific variation (wet/dry, moult), photo noise
_CURVATURE = 0.08  # the backbone's element-wise bend
_NUISANCE_KEPT = 0.4  # share of the nuisance component the partially trained model keeps
_DUPLICATE_JITTER = 0.1  # feature jitter of a re-uploaded photo

_FEATURE_GRID = 2.0**12
_EMBEDDING_GRID = 2.0**20

# Bump when the generator changes what it writes; recorded in the file metadata.
_GENERATOR_VERSION = 1
_METADATA_KEY = b"tripletkit.demo"

# Fixed writer options: the same table always gives the same bytes (no timestamps are written
# by pyarrow's Parquet writer; the footer records the writer's version string). Page checksums
# and compression come from the options of every file the package writes.
_WRITE_OPTIONS = dict(PARQUET_WRITE, row_group_size=1 << 16, version="2.6", data_page_version="1.0",
                      compression_level=3, use_dictionary=["label", "group", "site", "season"], write_statistics=True,
                      store_schema=True, write_page_index=False)


# ---------------------------------------------------------------------------------------------
# the generative model
# ---------------------------------------------------------------------------------------------
def _draw_world(rng):
    """The parts shared by every photo: mixing matrices, site and season offsets."""
    n_sites = len(SITES)
    world = {
        "mix_identity": rng.normal(size=(FEATURE_DIM, _ID_DIM)) / np.sqrt(_ID_DIM),
        "mix_nuisance": rng.normal(size=(FEATURE_DIM, _NUISANCE_DIM)) / np.sqrt(_NUISANCE_DIM),
        "site_offset": rng.normal(scale=_SITE_SPREAD, size=(n_sites, _NUISANCE_DIM)),
        "season_offset": rng.normal(scale=_SEASON_SPREAD, size=(len(SEASONS), _NUISANCE_DIM)),
        "projection": rng.normal(size=(EMBEDDING_DIM, FEATURE_DIM)) / np.sqrt(FEATURE_DIM),
        "site_difficulty": np.array([scale for _, scale in SITES], dtype=np.float64),
    }
    # Orthonormal basis of the nuisance subspace in feature space (before the curvature): the
    # partially trained model has learnt to remove part of the component in it.
    basis, _ = np.linalg.qr(world["mix_nuisance"])
    world["nuisance_basis"] = basis
    return world


def _draw_individuals(rng, n):
    """Latent identity vectors; a fraction are look-alike relatives of an earlier individual."""
    z = rng.normal(size=(n, _ID_DIM))
    kin = rng.random(n) < _KIN_FRACTION
    parents = rng.integers(0, np.maximum(np.arange(n), 1))
    mix = np.sqrt(1.0 - _KIN_CORRELATION**2)
    for i in np.flatnonzero(kin[1:]) + 1:  # sequential on purpose: kin of kin is allowed
        z[i] = _KIN_CORRELATION * z[parents[i]] + mix * z[i]
    own_directions = rng.normal(size=(n, _ID_DIM, _OWN_DIM)) / np.sqrt(_ID_DIM)
    home_site = rng.integers(0, len(SITES), size=n)
    return {"identity": z, "own_directions": own_directions, "home_site": home_site}


def _draw_counts(rng, n, n_singletons):
    counts = _PHOTOS_MIN + rng.poisson(_PHOTOS_EXTRA_MEAN, size=n)
    if n_singletons:
        counts[rng.choice(n, size=n_singletons, replace=False)] = 1
    return counts


def _draw_photos(rng, world, seals, counts):
    """Per-photo latent parts (identity + own variation, nuisance, noise) and the metadata."""
    who = np.repeat(np.arange(len(counts)), counts)
    m = who.size
    at_home = rng.random(m) < _HOME_SITE_FRACTION
    site = np.where(at_home, seals["home_site"][who], rng.integers(0, len(SITES), size=m))
    season = rng.integers(0, len(SEASONS), size=m)
    scales = np.concatenate([np.full(_POSE_DIM, _POSE_SCALE), np.full(_LIGHT_DIM, _LIGHT_SCALE),
                             np.full(_NUISANCE_DIM - _POSE_DIM - _LIGHT_DIM, _OTHER_NUISANCE_SCALE)])
    difficulty = world["site_difficulty"][site][:, None]
    nuisance = (rng.normal(size=(m, _NUISANCE_DIM)) * scales * difficulty
                + world["site_offset"][site] + world["season_offset"][season])
    own = np.einsum("mkj,mj->mk", seals["own_directions"][who], rng.normal(size=(m, _OWN_DIM)) * _OWN_SCALE)
    noise = rng.normal(size=(m, FEATURE_DIM)) * (_NOISE_SCALE * difficulty)
    return {"who": who, "site": site, "season": season, "identity": seals["identity"][who] + own,
            "nuisance": nuisance, "noise": noise}


def _backbone(world, identity, nuisance, noise):
    """Frozen backbone: linear mix of the latent parts with a mild element-wise curvature."""
    h = identity @ world["mix_identity"].T + nuisance @ world["mix_nuisance"].T + noise
    return _quantise(h + _CURVATURE * h * np.abs(h), _FEATURE_GRID)


def _partial_model(world, features):
    """Partially trained model: remove part of the nuisance component, project, normalise."""
    basis = world["nuisance_basis"]
    x = features - (1.0 - _NUISANCE_KEPT) * (features @ basis) @ basis.T
    e = x @ world["projection"].T
    e /= np.sqrt(np.einsum("ij,ij->i", e, e))[:, None]
    return _quantise(e, _EMBEDDING_GRID)


def _quantise(x, grid):
    """Round float64 values to a binary grid that float32 stores exactly (see module docstring)."""
    return np.round(x * grid) / grid


def _add_duplicates(rng, photos, features, n_train, n_dup):
    """File ``n_dup`` seals a second time: two near-duplicate photos each under a new label.

    Returns the extended photo dict and features, and (source row, duplicate row) pairs.
    """
    counts = np.bincount(photos["who"], minlength=n_train)
    eligible = np.flatnonzero(counts >= _PHOTOS_MIN)
    sources = np.sort(rng.choice(eligible, size=n_dup, replace=False))
    src_rows, new_who = [], []
    for k, seal in enumerate(sources):
        rows = np.flatnonzero(photos["who"] == seal)
        src_rows.extend(np.sort(rng.choice(rows, size=2, replace=False)).tolist())
        new_who.extend([n_train + k] * 2)
    src_rows = np.asarray(src_rows)
    # Same photo uploaded twice (re-encoded): the backbone output differs only by a small jitter.
    jitter = rng.normal(size=(src_rows.size, FEATURE_DIM)) * _DUPLICATE_JITTER
    dup_features = _quantise(features[src_rows] + jitter, _FEATURE_GRID)
    m = photos["who"].size
    out = {
        "who": np.concatenate([photos["who"], np.asarray(new_who)]),
        "site": np.concatenate([photos["site"], photos["site"][src_rows]]),
        "season": np.concatenate([photos["season"], photos["season"][src_rows]]),
    }
    pairs = list(zip(src_rows.tolist(), range(m, m + src_rows.size)))
    return out, np.concatenate([features, dup_features]), pairs


# ---------------------------------------------------------------------------------------------
# tables
# ---------------------------------------------------------------------------------------------
def _build_tables(seed):
    """All four demo tables as pyarrow Tables (keys of :data:`DEMO_FILES`)."""
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(4)]
    rng_world, rng_train, rng_heldout, rng_names = streams
    world = _draw_world(rng_world)

    train_seals = _draw_individuals(rng_train, _N_TRAIN)
    train_counts = _draw_counts(rng_train, _N_TRAIN, _N_TRAIN_SINGLETONS)
    train = _draw_photos(rng_train, world, train_seals, train_counts)
    train_x = _backbone(world, train["identity"], train["nuisance"], train["noise"])
    train, train_x, dup_rows = _add_duplicates(rng_train, train, train_x, _N_TRAIN, _N_DUPLICATE_SEALS)

    held_seals = _draw_individuals(rng_heldout, _N_HELDOUT)
    held_counts = _draw_counts(rng_heldout, _N_HELDOUT, 0)
    held = _draw_photos(rng_heldout, world, held_seals, held_counts)
    held_x = _backbone(world, held["identity"], held["nuisance"], held["noise"])

    # Catalogue numbers and photo numbers are shuffled so that neither order nor number tells
    # training from held-out individuals.
    n_train_labels = _N_TRAIN + _N_DUPLICATE_SEALS
    seal_numbers = rng_names.permutation(n_train_labels + _N_HELDOUT) + 1
    photo_numbers = rng_names.permutation(train_x.shape[0] + held_x.shape[0]) + 1
    train_labels = np.array([f"seal-{k:04d}" for k in seal_numbers[:n_train_labels]])
    held_labels = np.array([f"seal-{k:04d}" for k in seal_numbers[n_train_labels:]])
    train_ids = np.array([f"photo-{k:06d}" for k in photo_numbers[: train_x.shape[0]]])
    held_ids = np.array([f"photo-{k:06d}" for k in photo_numbers[train_x.shape[0]:]])

    duplicates = sorted(sorted((str(train_ids[a]), str(train_ids[b]))) for a, b in dup_rows)
    tables = {}
    for split, ids, labels, photos, x in (("train", train_ids, train_labels, train, train_x),
                                          ("heldout", held_ids, held_labels, held, held_x)):
        order = np.argsort(ids, kind="stable")
        e = _partial_model(world, x)
        common = {
            "id": ids[order],
            "label": labels[photos["who"]][order],
            "site": np.array([SITES[s][0] for s in photos["site"]])[order],
            "season": np.array(SEASONS)[photos["season"]][order],
        }
        for kind, values in (("embeddings", e), ("features", x)):
            name = f"{split}_{kind}"
            info = {
                "generator_version": _GENERATOR_VERSION,
                "seed": int(seed),
                "table": name,
                "scenario": "invented grey seal re-identification survey (not real animals)",
                "near_duplicates": duplicates if split == "train" else [],
            }
            tables[name] = _to_arrow(common, values[order], info)
    return tables


def _to_arrow(columns, values, info):
    n, d = values.shape
    flat = pa.array(np.ascontiguousarray(values, dtype=np.float32).reshape(-1), type=pa.float32())
    site = pa.array(columns["site"], type=pa.string())
    table = pa.table({
        "id": pa.array(columns["id"], type=pa.string()),
        "label": pa.array(columns["label"], type=pa.string()),
        "embedding": pa.FixedSizeListArray.from_arrays(flat, d),
        "group": site,
        "site": site,
        "season": pa.array(columns["season"], type=pa.string()),
    })
    meta = {_METADATA_KEY: json.dumps(info, sort_keys=True, separators=(",", ":")).encode()}
    return table.replace_schema_metadata(meta)


def _write_table(table, path, force):
    with atomic_path(path, force=force) as tmp:
        pq.write_table(table, tmp, **_WRITE_OPTIONS)
        # mkstemp creates the file readable by its owner only; a data file is for everyone.
        os.chmod(tmp, 0o644)


# ---------------------------------------------------------------------------------------------
# public entry points
# ---------------------------------------------------------------------------------------------
def generate(out_dir, seed=DEFAULT_SEED, force=False):
    """Write the four demo tables into ``out_dir``.

    The same ``seed`` with the same numpy and pyarrow versions gives the same bytes; the shipped
    ``demo_data/`` folder is ``generate("demo_data", force=True)`` with :data:`DEFAULT_SEED`.

    Parameters
    ----------
    out_dir : str or Path
        Folder to write into; created (with its parents) if missing.
    seed : int, default DEFAULT_SEED
        Non-negative integer seed of the whole scenario.
    force : bool, default False
        Replace existing files. Without it, nothing is written if any of the four files exists.

    Returns
    -------
    dict
        ``{key: Path}`` for the keys of :data:`DEMO_FILES` (``train_embeddings``,
        ``heldout_embeddings``, ``train_features``, ``heldout_features``).

    Raises
    ------
    TripletkitError
        Bad seed, ``out_dir`` is not a folder, or an output exists and ``force`` is false.
    """
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise TripletkitError(f"demo seed must be a non-negative integer, got {seed!r}")
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise TripletkitError(f"demo output {str(out_dir)!r} is a file, not a folder; name a folder")
    paths = {key: out_dir / name for key, name in DEMO_FILES.items()}
    if out_dir.is_dir():
        # Check all four before writing any, so a refusal leaves the folder untouched.
        for path in paths.values():
            check_output(path, force=force)
    tables = _build_tables(int(seed))
    out_dir.mkdir(parents=True, exist_ok=True)
    for key, path in paths.items():
        _write_table(tables[key], path, force)
    return paths


def _bundled_dir():
    # The repository layout: tripletkit/scenario.py next to demo_data/.
    return Path(__file__).resolve().parent.parent / "demo_data"


def demo_paths(cache_dir=None):
    """Paths of the demo tables: the repository's ``demo_data/`` or a generated cache.

    The tables ship in the repository's ``demo_data/`` folder, not inside the wheel. When that
    folder is found next to the package (a source checkout or an editable install) its files are
    returned. Otherwise (an installed wheel) the tables are generated into ``cache_dir`` with
    :data:`DEFAULT_SEED`, unless all four files are already there, in which case they are reused.

    Parameters
    ----------
    cache_dir : str or Path, optional
        Folder to generate into when the bundled folder is missing.

    Returns
    -------
    dict
        ``{key: Path}`` for the keys of :data:`DEMO_FILES`.

    Raises
    ------
    TripletkitError
        The bundled folder is missing and no ``cache_dir`` was given.
    """
    bundled = {key: _bundled_dir() / name for key, name in DEMO_FILES.items()}
    if all(p.is_file() for p in bundled.values()):
        return bundled
    if cache_dir is None:
        raise TripletkitError(
            f"demo tables not found in {str(_bundled_dir())!r} (installed without the repository?); "
            "pass a cache folder to generate them into"
        )
    cache = {key: Path(cache_dir) / name for key, name in DEMO_FILES.items()}
    if all(p.is_file() for p in cache.values()):
        return cache
    return generate(cache_dir, seed=DEFAULT_SEED, force=True)


#: The margin sweep the demo runs (fit-head mode on the raw features); paths are filled in.
DEMO_SWEEP_TOML = """\
# Written by `tripletkit demo`: a fit-head margin sweep on the demo features.
[sweep]
margins = [0.05, 0.2, 0.4]
mode = "fit-head"
primary = "eer"
bootstrap = 100

[data]
train = "{train}"
heldout = "{heldout}"

[head]
dim = 16
epochs = 4

[evaluation]
bootstrap = 100
"""


def demo(out="tripletkit-demo", *, force=False, quiet=False, sweep=True):
    """Run the loop on the demo data: check, mine, loss, score and a fit-head margin sweep.

    Everything is written inside ``out`` (created atomically: an interrupted demo leaves nothing):
    ``check.json``, ``triplets.parquet`` (+ ``triplets.duplicates.parquet``), ``loss.json``,
    ``score/`` (the evaluation report of the held-out seals), ``sweep.toml`` and ``sweep/``, and
    ``demo.json`` summarising all of it.

    Parameters
    ----------
    out : str or Path
        Folder to create.
    force : bool, default False
        Replace an existing ``out``.
    quiet : bool, default False
        No progress on stderr.
    sweep : bool, default True
        Run the margin sweep (the slowest stage).

    Returns
    -------
    dict
        Summary: per stage its headline numbers and where its outputs are.
    """
    from .config import EvaluationConfig, MiningConfig
    from .evaluate import score
    from .triplet_scores import loss
    from .mining import mine
    from .tables.check import check

    out = Path(out)
    summary = {}
    # --force replaces the folder: never one that holds the demo tables or the package itself
    check_not_input(out, [_bundled_dir(), Path(__file__).resolve().parent])
    with atomic_path(out, force=force, directory=True) as tmp:
        data = demo_paths(cache_dir=tmp / "data")
        say("demo", "checking the training dump and the held-out set", quiet)
        summary["check"] = {"train": check(data["train_embeddings"]), "heldout": check(data["heldout_embeddings"])}
        (tmp / "check.json").write_text(json.dumps(summary["check"], indent=2))

        say("demo", "mining semi-hard and hard triplets from the training dump", quiet)
        mining_cfg = MiningConfig(regimes=("semi-hard", "hard"), seed=0)
        mined = mine(data["train_embeddings"], out=tmp / "triplets.parquet", config=mining_cfg, quiet=quiet)
        summary["mine"] = {k: v for k, v in jsonable(mined).items() if k not in ("out", "duplicates_out")}

        say("demo", "scoring the mined triplets (loss)", quiet)
        summary["loss"] = loss(tmp / "triplets.parquet", data["train_embeddings"], margin=mining_cfg.margin)
        (tmp / "loss.json").write_text(json.dumps(jsonable(summary["loss"]), indent=2))

        say("demo", "scoring the held-out seals (verification, retrieval, clustering)", quiet)
        report = score(data["heldout_embeddings"], out=tmp / "score", config=EvaluationConfig(bootstrap=100),
                       quiet=quiet)
        ver = report["verification"]
        summary["score"] = {"eer": ver["eer"], "auc": ver["auc"],
                            "fnmr_at_fmr": {k: v["fnmr"] for k, v in ver["fnmr_at_fmr"].items()},
                            "recall_at_1": report["retrieval"]["recall_at_k"].get("1")}

        if sweep:
            say("demo", "sweeping the margin with a projection head on the raw features", quiet)
            cfg_path = tmp / "sweep.toml"
            cfg_path.write_text(DEMO_SWEEP_TOML.format(train=Path(data["train_features"]).resolve(),
                                                       heldout=Path(data["heldout_features"]).resolve()))
            from .sweeps import sweep as run_sweep

            result = run_sweep(cfg_path, out=tmp / "sweep", quiet=quiet)
            # sweep.json names its config by the path it was given: the temporary folder's, which
            # is gone after the rename; record where the file will be
            sweep_json = tmp / "sweep" / "sweep.json"
            recorded = json.loads(sweep_json.read_text(encoding="utf-8"))
            recorded["config"] = str(out / "sweep.toml")
            sweep_json.write_text(json.dumps(recorded, indent=2) + "\n", encoding="utf-8")
            summary["sweep"] = {"best": result["comparison"]["best"], "runner_up": result["comparison"]["runner_up"],
                                "verdict": result["comparison"]["verdict"]}
        (tmp / "demo.json").write_text(json.dumps(jsonable(summary), indent=2))
    summary["reports"] = {
        "folder": str(out),
        "triplets": str(out / "triplets.parquet"),
        "score": str(out / "score" / "report.md"),
        **({"sweep": str(out / "sweep" / "sweep.md")} if sweep else {}),
    }
    say("demo", f"done; reports are in {out}/ (score/report.md" + (", sweep/sweep.md)" if sweep else ")"), quiet)
    return summary


def main(argv=None):
    """``python -m tripletkit.scenario --regenerate DIR [--seed N] [--force]``; returns an exit code."""
    parser = argparse.ArgumentParser(prog="python -m tripletkit.scenario",
                                     description="Regenerate the invented seal re-identification demo tables "
                                                 "byte for byte.")
    parser.add_argument("--regenerate", metavar="DIR", required=True, help="folder to write the four tables into")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"scenario seed (default {DEFAULT_SEED})")
    parser.add_argument("--force", action="store_true", help="replace existing files")
    args = parser.parse_args(argv)
    try:
        paths = generate(args.regenerate, seed=args.seed, force=args.force)
    except TripletkitError as err:
        print(f"error: {err}", file=sys.stderr)
        return 2
    for path in paths.values():
        print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
