"""The straightforward batch script tracewatch is measured against.

What an engineer would write in an afternoon with scikit-learn for the same job: parse each
line with a regex, mask the variable fields with a few regexes, group the masked messages
into sessions by request id, turn each session into counts of message n-grams (1..3) with
``CountVectorizer``, weight them with ``TfidfTransformer`` (sublinear tf, L2 norm) and cluster
the baseline sessions with ``KMeans``. A session of the scored file is flagged when its
distance to the nearest centre is above the baseline's (1 - false_alarm_rate) percentile.

It has none of tracewatch's machinery (no template mining, no idle timeouts, no explanations,
no calibration hold-out, no cache) and reads the whole file before it scores anything.

    script_baseline.py --baseline BASE.log --score DAY.log [--out FLAGGED.jsonl]

prints one JSON object: timings of the fit and the scoring pass and what was flagged.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import time
from collections import defaultdict

import numpy as np
from sklearn.cluster import KMeans
from sklearn.feature_extraction.text import CountVectorizer, TfidfTransformer
from sklearn.pipeline import Pipeline

LINE = re.compile(r"^(\S+) ([A-Z]+) \[([^\]]+)\] req=(\S+) (.*)$")
MASKS = [
    (re.compile(r"\b[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}\b"), "<uuid>"),
    (re.compile(r"\b\d{1,3}(?:\.\d{1,3}){3}\b"), "<ip>"),
    (re.compile(r"\b0x[0-9a-fA-F]+\b"), "<hex>"),
    (re.compile(r"[\w.-]*\d[\w.-]*"), "<num>"),  # any token holding a digit: ids, counts, durations
]
K = 8
FALSE_ALARM_RATE = 0.005


def mask(message: str) -> str:
    for pattern, repl in MASKS:
        message = pattern.sub(repl, message)
    return message


def read_sessions(path: str) -> tuple[dict[str, list[str]], int]:
    """Masked messages of every request id, in file order, and the number of lines read."""
    sessions: dict[str, list[str]] = defaultdict(list)
    n = 0
    with open(path, encoding="utf-8", errors="replace") as fh:
        for line in fh:
            n += 1
            m = LINE.match(line.rstrip("\n"))
            if m is None:
                continue
            sessions[m.group(4)].append(mask(m.group(5)))
    return sessions, n


def _same(x):
    return x


def make_model() -> Pipeline:
    # each document is a session's list of masked messages; n-grams are runs of messages
    vectorizer = CountVectorizer(analyzer="word", tokenizer=_same, preprocessor=_same, lowercase=False,
                                 token_pattern=None, ngram_range=(1, 3))
    return Pipeline([("counts", vectorizer), ("tfidf", TfidfTransformer(sublinear_tf=True)),
                     ("kmeans", KMeans(n_clusters=K, n_init=3, random_state=0))])


def fit(path: str) -> tuple[Pipeline, float]:
    sessions, _ = read_sessions(path)
    model = make_model()
    dist = model.fit_transform(list(sessions.values())).min(axis=1)
    return model, float(np.percentile(dist, 100 * (1 - FALSE_ALARM_RATE)))


def score(model: Pipeline, threshold: float, path: str, out) -> dict:
    sessions, n_lines = read_sessions(path)
    keys = list(sessions)
    dist = model.transform(list(sessions.values())).min(axis=1)
    flagged = np.flatnonzero(dist > threshold)
    for i in flagged:
        out.write(json.dumps({"session_key": keys[i], "distance": round(float(dist[i]), 6)}) + "\n")
    return {"lines": n_lines, "sessions": len(keys), "flagged": int(len(flagged))}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--baseline", required=True)
    ap.add_argument("--score", required=True)
    ap.add_argument("--out", default="-", help="write the flagged sessions here as JSON lines (default: not written)")
    a = ap.parse_args(argv)
    t0 = time.perf_counter()
    model, threshold = fit(a.baseline)
    t1, c1 = time.perf_counter(), time.process_time()
    with open(a.out if a.out != "-" else "/dev/null", "w", encoding="utf-8") as out:
        report = score(model, threshold, a.score, out)
    t2, c2 = time.perf_counter(), time.process_time()
    print(json.dumps({"fit_s": t1 - t0, "score_s": t2 - t1, "score_cpu_s": c2 - c1, "threshold": threshold,
                      **report}))
    return 0


if __name__ == "__main__":
    sys.exit(main())
