# tracewatch — every target builds .venv itself; only Python 3.11 is needed on the machine.
PYTHON ?= python3.11
VENV   := .venv
PY     := $(VENV)/bin/python
PIP    := $(VENV)/bin/pip

.PHONY: demo test bench install clean

$(VENV)/.installed: pyproject.toml
	@command -v $(PYTHON) >/dev/null 2>&1 || { echo "make: $(PYTHON) not found; install Python 3.11 or run 'make PYTHON=python3 ...'"; exit 2; }
	$(PYTHON) -m venv $(VENV)
	$(PIP) install --quiet --upgrade pip
	$(PIP) install --quiet -e .
	touch $@

$(VENV)/.installed-test: $(VENV)/.installed
	$(PIP) install --quiet -e '.[test]'
	touch $@

install: $(VENV)/.installed

demo: $(VENV)/.installed
	$(VENV)/bin/tracewatch demo --dir ./tracewatch-demo

# strace (for the strace-format tests) is installed with apt-get when missing and possible;
# without it those tests skip and say why, so `make test` never fails for the tool
test: $(VENV)/.installed-test
	@command -v strace >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq strace; } >/dev/null 2>&1 \
	  || echo "make: strace could not be installed (needs root and apt-get); its tests will be skipped"; }
	@# Debian's chromium, for the incident page's browser test (tests/test_page.py): the same rule
	@command -v chromium >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq chromium; } >/dev/null 2>&1 \
	  || echo "make: chromium could not be installed (needs root and apt-get); the browser test will be skipped"; }
	@# Debian's prometheus and prometheus-alertmanager, for tests/test_prometheus_real.py and
	@# tests/test_alertmanager_real.py (the deploy/ examples run for real): the same rule
	@{ command -v prometheus && command -v prometheus-alertmanager; } >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends prometheus prometheus-alertmanager; } >/dev/null 2>&1 \
	  || echo "make: prometheus/prometheus-alertmanager could not be installed (needs root and apt-get); their tests will be skipped"; }
	@# Debian's systemd (systemd-analyze, systemd-sysusers, systemd-notify), for the unit file's
	@# checks (tests/test_deploy_systemd.py, tests/test_systemd_notify.py), and rsync, for shipping
	@# baselines as README says (tests/test_deploy_fleet.py): the same rule
	@{ command -v systemd-analyze && command -v systemd-sysusers && command -v systemd-notify; } >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends systemd; } >/dev/null 2>&1 \
	  || echo "make: systemd could not be installed (needs root and apt-get); the unit file's tests will be skipped"; }
	@# Debian's zsh, for the completion script's zsh test (tests/test_cli.py): the same rule
	@command -v zsh >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends zsh; } >/dev/null 2>&1 \
	  || echo "make: zsh could not be installed (needs root and apt-get); its completion test will be skipped"; }
	@command -v rsync >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends rsync; } >/dev/null 2>&1 \
	  || echo "make: rsync could not be installed (needs root and apt-get); the baseline-shipping test will be skipped"; }
	@# Debian's systemd-journal-remote, which writes real journal files for the journald tests
	@# (tests/test_journald.py; journalctl comes with systemd above): the same rule
	@{ command -v systemd-journal-remote || test -x /lib/systemd/systemd-journal-remote; } >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends systemd-journal-remote; } >/dev/null 2>&1 \
	  || echo "make: systemd-journal-remote could not be installed (needs root and apt-get); the journald tests will be skipped"; }
	@# Debian's postgresql (a real server under pgbench, for tests/test_postgres_real.py): the same rule
	@{ ls /usr/lib/postgresql/*/bin/postgres && command -v pgbench; } >/dev/null 2>&1 || { export DEBIAN_FRONTEND=noninteractive; \
	  { apt-get update -qq && apt-get install -y -qq --no-install-recommends postgresql; } >/dev/null 2>&1 \
	  || echo "make: postgresql could not be installed (needs root and apt-get); its test will be skipped"; }
	$(PY) -m pytest -q

bench: $(VENV)/.installed-test
	$(PY) bench/run.py

clean:
	rm -rf $(VENV) tracewatch-demo .pytest_cache
