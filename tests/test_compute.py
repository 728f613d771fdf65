"""Dask: the same model, bit for bit, whatever the number of workers (skipped without Dask)."""

from pathlib import Path

import numpy as np
import pytest

import discover

pytest.importorskip("dask.distributed")
ROOT = Path(__file__).resolve().parents[1]


def bioreactor(**compute):
    import tomllib
    raw = tomllib.loads((ROOT / "configs" / "bioreactor.toml").read_text())
    raw["data"]["files"] = [str(ROOT / "configs" / f) for f in raw["data"]["files"]]
    raw["bootstrap"] = {"members": 40, "bands": False}
    raw["ranking"] = {"enabled": False}
    raw["output"] = {"figures": False, "report": False}
    raw["compute"] = compute
    return raw


def test_dask_cluster_gives_the_same_model_as_one_process():
    # Reference: the in-process run. Partial Grams and member batches are Dask tasks,
    # gathered and summed in submission order (common practice for reproducible reductions).
    here = discover.run(bioreactor())
    results = [discover.run(bioreactor(scheduler="local", workers=n, processes=False)) for n in (1, 3)]
    for other in results:
        assert other.model.to_dict() == here.model.to_dict()
        assert np.array_equal(other.ensemble.coef, here.ensemble.coef)


def test_unreachable_scheduler_is_a_config_error():
    with pytest.raises(discover.ConfigError, match=r"cannot reach the Dask scheduler at \[compute\].scheduler = 'tcp://127.0.0.1:9'"):
        discover.run(bioreactor(scheduler="tcp://127.0.0.1:9", timeout=2.0))
