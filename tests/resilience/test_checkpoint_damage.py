"""Damaged checkpoints: truncated or corrupted table files, missing, unreadable or too-new manifests.

One run (ibm1:3, forward) is trained once; each test damages a copy of it and
resumes. ``--resume`` must name what is wrong, fall back to the newest intact
checkpoint, and end with the same tables and output as the undamaged run.
"""
from __future__ import annotations

import glob
import json
import os
import shutil

import pytest

from spark_align.config import CorpusConfig
from spark_align.engine.run import train
from spark_align.errors import CheckpointError
from tests.engine.helpers import TOY_SOURCE, TOY_TARGET, config, write_text
from tests.resilience.proc import lex_table, output_table

pytestmark = pytest.mark.spark


@pytest.fixture(scope="module")
def trained(spark, tmp_path_factory):
    base = tmp_path_factory.mktemp("damage")
    s, t = write_text(base, TOY_SOURCE * 2, TOY_TARGET * 2)
    cfg = config(CorpusConfig(source_text=s, target_text=t), "ibm1:3", directions="forward")
    run_dir = base / "pristine"
    train(spark, cfg, str(run_dir), log=lambda _: None)
    return cfg, run_dir


def copy_run(trained, tmp_path):
    _, pristine = trained
    run_dir = tmp_path / "run"
    shutil.copytree(pristine, run_dir)
    os.remove(run_dir / "output.json")  # so the test sees the resumed run write it again
    return run_dir


def iter_dir(run_dir, iteration):
    return run_dir / "checkpoints" / "00-ibm1" / f"iter-{iteration:04d}"


def table_file(run_dir, iteration) -> str:
    """The checkpoint's largest table file (one per reducer; some reducers may write no rows)."""
    paths = glob.glob(str(iter_dir(run_dir, iteration) / "lex" / "part-*.parquet"))
    assert paths
    return max(paths, key=os.path.getsize)


def resume(spark, trained, run_dir, **kw) -> list[str]:
    cfg, _ = trained
    lines: list[str] = []
    train(spark, cfg, str(run_dir), resume=True, log=lines.append, **kw)
    return lines


def assert_same_as_pristine(trained, run_dir) -> None:
    _, pristine = trained
    for it in (1, 2, 3):
        assert lex_table(str(run_dir), "00-ibm1", it).equals(lex_table(str(pristine), "00-ibm1", it)), it
    assert output_table(str(run_dir)).equals(output_table(str(pristine)))
    assert (run_dir / "output.json").exists()


def test_truncated_table_and_newer_manifest_fall_back_two_checkpoints(spark, trained, tmp_path):
    run_dir = copy_run(trained, tmp_path)
    path = table_file(run_dir, 3)
    with open(path, "r+b") as fh:
        fh.truncate(os.path.getsize(path) // 2)
    m2 = iter_dir(run_dir, 2) / "manifest.json"
    manifest = json.loads(m2.read_text())
    m2.write_text(json.dumps({**manifest, "format_version": 99}))
    lines = resume(spark, trained, run_dir)
    text = "\n".join(lines)
    assert f"warning: checkpoint ibm1:3 is damaged (table files differ from the manifest (missing: [], " \
           f"wrong size: ['{os.path.basename(path)}']" in text
    assert "warning: checkpoint ibm1:2 is damaged (manifest format 99 is newer than this version (1))" in text
    assert "resuming after checkpoint ibm1:1" in text
    assert sum(x.startswith("[stage") for x in lines) == 2  # iterations 2 and 3 were trained again
    assert_same_as_pristine(trained, run_dir)


def test_corrupted_bytes_of_same_size_are_caught_by_the_checksum(spark, trained, tmp_path):
    run_dir = copy_run(trained, tmp_path)
    path = table_file(run_dir, 3)
    size = os.path.getsize(path)
    with open(path, "r+b") as fh:  # flip bytes in the middle: same size, different content
        fh.seek(size // 2)
        chunk = fh.read(8)
        fh.seek(size // 2)
        fh.write(bytes(b ^ 0xFF for b in chunk))
    lines = resume(spark, trained, run_dir)
    text = "\n".join(lines)
    assert f"warning: checkpoint ibm1:3 is damaged (table file {os.path.basename(path)} has CRC-32 " in text
    assert "the manifest says" in text and "resuming after checkpoint ibm1:2" in text
    assert_same_as_pristine(trained, run_dir)


def test_missing_and_unreadable_manifests_are_ignored_with_a_note(spark, trained, tmp_path):
    run_dir = copy_run(trained, tmp_path)
    os.remove(iter_dir(run_dir, 3) / "manifest.json")
    (iter_dir(run_dir, 2) / "manifest.json").write_text('{"format_version": 1, "stage": "ibm1", "iter')
    (iter_dir(run_dir, 2) / "manifest.json.tmp-0123abcd").write_text('{"format_')  # left by a crash
    lines = resume(spark, trained, run_dir)
    text = "\n".join(lines)
    assert "note: ignoring checkpoints/00-ibm1/iter-0003: no manifest.json (never committed)" in text
    assert "note: ignoring checkpoints/00-ibm1/iter-0002: unreadable manifest:" in text
    assert "resuming after checkpoint ibm1:1" in text
    assert_same_as_pristine(trained, run_dir)


def test_every_checkpoint_damaged_starts_again_from_the_beginning(spark, trained, tmp_path):
    run_dir = copy_run(trained, tmp_path)
    for it in (1, 2, 3):
        os.remove(table_file(run_dir, it))
    lines = resume(spark, trained, run_dir)
    assert sum("is damaged (table files differ from the manifest" in x for x in lines) == 3
    assert not any("resuming" in x for x in lines)
    assert sum(x.startswith("[stage") for x in lines) == 3
    assert_same_as_pristine(trained, run_dir)


def test_resume_from_a_named_checkpoint_redoes_the_later_iterations(spark, trained, tmp_path):
    run_dir = copy_run(trained, tmp_path)
    cfg, _ = trained
    lines = []
    train(spark, cfg, str(run_dir), resume_from="ibm1:1", log=lines.append)
    assert "resuming from checkpoint ibm1:1; later checkpoints removed" in lines
    assert [x.split("]")[0] for x in lines if x.startswith("[stage")] == ["[stage 1 ibm1 2/3", "[stage 1 ibm1 3/3"]
    assert_same_as_pristine(trained, run_dir)


def test_resume_from_a_damaged_checkpoint_refuses(spark, trained, tmp_path):
    cfg, _ = trained
    run_dir = copy_run(trained, tmp_path)
    with open(table_file(run_dir, 2), "r+b") as fh:
        fh.truncate(100)
    with pytest.raises(CheckpointError, match="checkpoint ibm1:2 is damaged: table files differ from the manifest"):
        train(spark, cfg, str(run_dir), resume_from="ibm1:2", log=lambda _: None)
    with pytest.raises(CheckpointError, match=r"no committed checkpoint 'ibm1:7' \(committed: ibm1:1, ibm1:2, ibm1:3\)"):
        train(spark, cfg, str(run_dir), resume_from="ibm1:7", log=lambda _: None)
    assert os.path.exists(iter_dir(run_dir, 3) / "manifest.json")  # the refusals removed nothing


def test_run_written_by_a_newer_format_is_refused(spark, trained, tmp_path):
    cfg, _ = trained
    run_dir = copy_run(trained, tmp_path)
    run_json = json.loads((run_dir / "run.json").read_text())
    (run_dir / "run.json").write_text(json.dumps({**run_json, "format_version": 7}))
    with pytest.raises(CheckpointError, match=r"was written by a newer spark_align \(format 7 > 1\); upgrade"):
        train(spark, cfg, str(run_dir), resume=True, log=lambda _: None)
    assert not (run_dir / "output.json").exists()
