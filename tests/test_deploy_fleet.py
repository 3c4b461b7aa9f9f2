"""README, "Beyond one machine": a baseline fitted centrally and shipped as files with the two
rsync lines README gives reaches a running daemon, which switches to it by itself.

The rsync lines are taken from README as written; only what ties them to this machine changes:
the central and the node's folders become test folders, the version becomes the one fitted here,
and ``--chown`` goes (the test machine has no tracewatch user)."""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess

from tracewatch.batch import assign_sources, fit_files

from .conftest import ROOT
from .daemon_helpers import InProcess, free_port, need_program, write_config


def readme_rsync_lines() -> list[str]:
    text = (ROOT / "README.md").read_text()
    section = text[text.index("### Beyond one machine"):]
    lines = [line.strip() for line in section.splitlines() if line.strip().startswith("rsync ")]
    assert len(lines) == 2 and lines[0].split()[-2].endswith("/v0007") and "CURRENT" in lines[1]
    return lines


def test_a_baseline_shipped_with_rsync_is_picked_up_by_a_running_daemon(tmp_path, demo_fit, demo_state):
    rsync = need_program("rsync", "rsync")
    central = tmp_path / "central"
    shutil.copytree(demo_state, central / "state")  # the central history: the node's v0001, then a new fit
    cfg = demo_fit.cfg.model_copy(update={"state_dir": central / "state"})
    new, _, _ = fit_files(cfg, assign_sources(cfg, [str(demo_fit.day)]))
    assert new.version != demo_fit.baseline.version

    live = InProcess(write_config(tmp_path, free_port()))  # state_dir: demo_state, at v0001
    try:
        assert live.daemon.status()["baseline_version"] == demo_fit.baseline.version
        for line in readme_rsync_lines():
            line = (line.replace("/srv/tracewatch/state", str(central / "state"))
                        .replace("host1:/var/lib/tracewatch", str(demo_state))
                        .replace("v0007", new.version).replace("--chown=tracewatch:tracewatch ", ""))
            argv = shlex.split(line)
            subprocess.run([rsync, *argv[1:]], check=True, timeout=60)
        live.until(lambda: live.daemon.status()["baseline_version"] == new.version, "the shipped baseline in use")
        assert live.daemon.watch.failures == 0
        assert re.fullmatch(r"v\d{4}", (demo_state / "baselines" / "CURRENT").read_text().strip())
    finally:
        live.stop()
