"""The stages of a long job (engine/common/progress.py), as the command line shows them.

One list of stages serves the command line and the add-on (tests/test_addon_job.py and
tests/blender/test_modal.py check the add-on's side against the same plans)."""

import io
import re
import subprocess
import sys
from pathlib import Path

import pytest

from engine.carrying.color import encode_bytes
from engine.common import progress
from engine.common.progress import (CARRYING, DETAIL, DONE, MATCHING, READING, REFINING, SIMPLIFYING, STAGES,
                                    STOPPED, WRITING, Step, job_stages, showing, skip, stage)
from engine.intake.files import write_ply
from engine.jobs.demo import creature, creature_signals
from engine.matching.standin import STANDIN_ABOVE

ROOT = Path(__file__).resolve().parents[1]
LINE = re.compile(r"^stage (\d+)/(\d+): (.+) \((\d+\.\d) s\)$")


def stage_lines(text):
    """(number, total, name) of every plain stage line of ``text``; other lines must not look like one."""
    found = []
    for line in text.splitlines():
        match = LINE.match(line)
        if match:
            found.append((int(match[1]), int(match[2]), match[3]))
        else:
            assert not line.startswith("stage "), line
    return found


class Terminal(io.StringIO):
    def isatty(self):
        return True


def test_plain_lines_or_a_bar():
    stage("nobody listens")                      # outside a block: shown nowhere, no error
    plain = io.StringIO()
    with showing(plain, (READING, MATCHING)):
        stage(READING)
        stage(MATCHING)
    assert stage_lines(plain.getvalue()) == [(1, 2, READING), (2, 2, MATCHING)]
    tty = Terminal()
    with showing(tty, (READING, MATCHING)):
        stage(READING)
        stage(MATCHING)
    text = tty.getvalue()
    # two redraws of one line and its clearing at the end; the bar half full at stage 2 of 2
    assert "\n" not in text and text.count("\r") == 3 and f"[##########----------] 2/2 {MATCHING}" in text
    assert text.endswith("\r\x1b[K")


def test_the_plans_follow_the_one_order():
    for kind in ("transfer", "detail", "preview"):
        plan = job_stages(kind)
        assert list(plan) == sorted(plan, key=STAGES.index) and plan[0] == READING and plan[-1] == WRITING
    assert job_stages("transfer") == (READING, SIMPLIFYING, MATCHING, REFINING, CARRYING, WRITING)
    assert job_stages("detail") == (READING, SIMPLIFYING, MATCHING, REFINING, DETAIL, WRITING)
    # a run doing both (the batch command's pair with detail): one plan, carrying before the detail
    assert job_stages("detail", "transfer") == (READING, SIMPLIFYING, MATCHING, REFINING, CARRYING, DETAIL,
                                                WRITING)
    with pytest.raises(ValueError, match="unknown job kind 'colour'"):
        job_stages("colour")
    assert len(set(STAGES)) == len(STAGES) and DONE not in STAGES and STOPPED not in STAGES


def test_steps_skip_forward_only_and_the_share_grows():
    steps = []
    with showing(steps.append, job_stages("transfer")):
        stage(READING)
        skip(READING, SIMPLIFYING, REFINING)      # a stage already passed stays counted
        stage(SIMPLIFYING)                        # skipped: not shown
        stage(MATCHING)
        stage(MATCHING)                           # again (a second piece): not shown twice
        stage(READING)                            # behind: not shown
        stage("smoothing the values")             # another kind of job's stage: not shown
        stage(CARRYING)
        stage(WRITING)
    assert [(s.name, s.done, s.total) for s in steps] == [
        (READING, 1, 6), (MATCHING, 2, 4), (CARRYING, 3, 4), (WRITING, 4, 4), (DONE, 4, 4)]
    fractions = [s.fraction for s in steps]
    assert fractions == [0.0, 0.25, 0.5, 0.75, 1.0]
    assert all(b >= a for a, b in zip([s.seconds for s in steps], [s.seconds for s in steps][1:]))
    failed = []
    with pytest.raises(ValueError):
        with showing(failed.append, job_stages("detail")):
            stage(READING)
            raise ValueError("bad mesh")
    assert [s.name for s in failed] == [READING, STOPPED] and failed[-1].fraction == 0.0
    assert not progress._current                  # every block closed


def run_cli(*args, cwd):
    proc = subprocess.run([sys.executable, "-m", "engine", *map(str, args)], cwd=cwd, capture_output=True,
                          text=True, env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin",
                                          "OPENBLAS_NUM_THREADS": "1"})
    assert proc.returncode == 0, proc.stderr
    return proc.stdout


@pytest.mark.parametrize("rings,segments,expected", [
    (40, 20, [READING, MATCHING, CARRYING, WRITING]),
    # over STANDIN_ABOVE vertices: matched through simplified copies, then refined at full resolution
    (300, 150, [READING, SIMPLIFYING, MATCHING, REFINING, CARRYING, WRITING]),
])
def test_the_command_line_names_the_stages_of_the_job(tmp_path, rings, segments, expected):
    s, t = creature(rings, segments), creature(48, 22, twist_offset=True, shuffle_seed=3)
    assert (len(s.vertices) > STANDIN_ABOVE) == (SIMPLIFYING in expected)
    sig = creature_signals(s.uv)
    write_ply(tmp_path / "src.ply", s.vertices, faces=s.faces, properties={"color": encode_bytes(sig["tint"])})
    write_ply(tmp_path / "tgt.ply", t.vertices, faces=t.faces)
    for kind, carrying in (("transfer", CARRYING), ("detail", DETAIL)):
        out = run_cli(kind, "src.ply", "tgt.ply", "-o", f"{kind}.ply", cwd=tmp_path)   # a pipe: plain lines
        lines = stage_lines(out)
        assert [name for _, _, name in lines] == [carrying if n == CARRYING else n for n in expected], out
        # numbered 1.. in the plan that remains once the job knows the meshes' sizes
        assert [n for n, _, _ in lines] == list(range(1, len(lines) + 1))
        assert [total for _, total, _ in lines[1:]] == [len(expected)] * (len(expected) - 1)
        assert lines[0][1] == len(job_stages(kind))
        shares = [Step(name, n, total, 0.0).fraction for n, total, name in lines]
        assert all(b > a for a, b in zip(shares, shares[1:]))
        assert out.index(lines[-1][2]) < out.index("match: ")   # the stages come before the report
