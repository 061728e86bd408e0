"""Training with several processes (Lightning's distributed data parallel on CPU, gloo).

The reference is the same run in one process: data parallelism averages the gradients
of equal shares of a batch, which is the gradient of the whole batch (Li et al. 2020,
"PyTorch Distributed: Experiences on Accelerating Data Parallel Training", VLDB 13(12)),
so two processes x one thread and one process x two threads with the same global batch
and seed must reach the same validation loss; the issue's target is 2 %.
"""

from __future__ import annotations

import csv
import os
import subprocess
import sys
from pathlib import Path

import pytest

from despeck.errors import ConfigError
from despeck.models import read_model_metadata
from despeck.training import load_config, train
from despeck.training import trainer as trainer_module
from despeck.training.data import EpochSampler
from despeck.training.trainer import process_layout

ROOT = Path(__file__).resolve().parents[1]
TINY = ROOT / "configs" / "tiny.yaml"


@pytest.mark.parametrize("world", [1, 2, 3, 4])
def test_ranks_together_draw_the_single_process_batches(world):
    # Each step's global batch is the same keys whatever the number of processes, and
    # the processes' shares are disjoint (definition of the sharding; no outside source).
    batch, length = 12, 100
    single = list(EpochSampler(length))
    shares = [list(EpochSampler(length, rank=r, world=world, batch_size=batch)) for r in range(world)]
    per = batch // world
    for s in range(length // batch):
        together = [key for share in shares for key in share[s * per:(s + 1) * per]]
        assert together == single[s * batch:(s + 1) * batch]
    assert all(len(share) == len(EpochSampler(length, rank=r, world=world, batch_size=batch))
               for r, share in enumerate(shares))
    with pytest.raises(ValueError):
        EpochSampler(length, rank=0, world=5, batch_size=batch)


def test_process_layout_threads_ranks_and_refusals(monkeypatch):
    monkeypatch.setattr(trainer_module, "usable_cores", lambda: 8)
    for key in ("LOCAL_RANK", "NODE_RANK", "GROUP_RANK", "MASTER_ADDR", "MASTER_PORT"):
        monkeypatch.delenv(key, raising=False)
    cfg = load_config(TINY, ["trainer.threads=null", "trainer.processes_per_node=4", "trainer.nodes=2"])
    with pytest.raises(ConfigError, match="MASTER_ADDR, MASTER_PORT, NODE_RANK not set"):
        process_layout(cfg)  # several machines: nothing guessed
    monkeypatch.setenv("MASTER_ADDR", "127.0.0.1")
    monkeypatch.setenv("MASTER_PORT", "29500")
    monkeypatch.setenv("NODE_RANK", "0")
    layout = process_layout(cfg)
    assert (layout.world, layout.rank, layout.threads) == (8, 0, 2)  # 8 usable cores // 4 processes
    # Lightning's numbering: NODE_RANK * processes_per_node + LOCAL_RANK.
    monkeypatch.setenv("NODE_RANK", "1")
    monkeypatch.setenv("LOCAL_RANK", "3")
    assert process_layout(cfg).rank == 7
    monkeypatch.setenv("NODE_RANK", "2")
    with pytest.raises(ConfigError, match="NODE_RANK=2"):
        process_layout(cfg)
    with pytest.raises(ConfigError, match="trainer.threads: 3 threads x 4 processes"):
        process_layout(load_config(TINY, ["trainer.threads=3", "trainer.processes_per_node=4"]))
    with pytest.raises(ConfigError, match="trainer.processes_per_node: 9 processes exceed the 8"):
        process_layout(load_config(TINY, ["trainer.threads=null", "trainer.processes_per_node=9",
                                          "data.batch_size=18", "data.val_patches=18"]))
    with pytest.raises(ConfigError, match="data.batch_size: 8 does not divide evenly among the 3 processes"):
        load_config(TINY, ["trainer.processes_per_node=3"])
    with pytest.raises(ConfigError, match="data.val_patches"):
        load_config(TINY, ["trainer.processes_per_node=2", "data.val_patches=1"])


def _last_validation(metrics_path):
    rows = [r for r in csv.DictReader(open(metrics_path, newline="")) if r.get("val_loss")]
    return rows[-1]


def _ddp_train(out, *extra):
    env = {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
    for key in ("LOCAL_RANK", "NODE_RANK", "WORLD_SIZE", "MASTER_PORT"):
        env.pop(key, None)
    env["MASTER_ADDR"] = "127.0.0.1"  # localhost only
    cmd = [sys.executable, "-m", "despeck", "train", "--config", str(TINY), "--quiet",
           "--set", f"output.dir={out}", "--set", "trainer.threads=null", "--set", "trainer.processes_per_node=2",
           "--set", "budget.max_time=null", *extra]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=240, env=env, cwd=str(out.parent))


@pytest.mark.distributed
def test_two_processes_reach_the_validation_loss_of_one(tmp_path):
    # One process with two threads, 16 steps of a global batch of 8, seed 0.
    single = train(load_config(TINY, [f"output.dir={tmp_path / 'one'}", "trainer.threads=2",
                                      "budget.max_epochs=2", "budget.max_time=null"]), progress=False)
    # Two processes x one thread, the same global batch and seed: one epoch, then resumed
    # for the second (resuming under DDP continues the run as if uninterrupted).
    out = tmp_path / "two"
    first = _ddp_train(out, "--set", "budget.max_epochs=1")
    assert first.returncode == 0, first.stderr[-2000:]
    resumed = _ddp_train(out, "--set", "budget.max_epochs=2", "--resume")
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    assert resumed.stdout.count("model: ") == 1  # process 1 prints nothing

    a, b = _last_validation(single.metrics_path), _last_validation(out / "metrics.csv")
    assert int(a["step"]) == int(b["step"]) == 15
    # The target: validation loss within 2 % (in practice equal to float rounding).
    assert float(b["val_loss"]) == pytest.approx(float(a["val_loss"]), rel=0.02)
    assert float(b["val_psnr_db"]) == pytest.approx(float(a["val_psnr_db"]), rel=0.02)

    # Only process 0 wrote: one set of run files, no stray temporaries; each process had
    # one thread (2 usable cores // 2 processes, or fewer where the affinity is smaller).
    names = sorted(p.name for p in out.iterdir())
    assert names == ["checkpoints", "config.yaml", "metrics.csv", "model.safetensors"]
    assert sorted(p.name for p in (out / "checkpoints").iterdir()) == ["best.ckpt", "last.ckpt"]
    training = read_model_metadata(out / "model.safetensors")["training"]
    assert training["threads"] == 1 and training["steps"] == 16
