"""README's deployment sections use exactly the files the deployment tests check: each file of
deploy/systemd, deploy/container, deploy/kubernetes and deploy/otel-collector is named there by
its path, and every deploy/ path README names exists."""

from __future__ import annotations

import re

from .conftest import ROOT

FOLDERS = ("systemd", "container", "kubernetes", "otel-collector")


def test_readme_names_every_deployment_file_by_its_path():
    readme = (ROOT / "README.md").read_text()
    section = readme[readme.index("## Deployment"):readme.index("## Config reference")]
    files = [p for folder in FOLDERS for p in sorted((ROOT / "deploy" / folder).iterdir())]
    assert len(files) >= 14
    for path in files:
        rel = path.relative_to(ROOT).as_posix()
        assert rel in section or f"`{path.name}`" in section, f"README's Deployment section does not name {rel}"
    named = set(re.findall(r"deploy/[\w./-]+\w", readme))
    missing = sorted(p for p in named if not (ROOT / p).exists())
    assert not missing, f"README names deploy/ paths that do not exist: {missing}"
