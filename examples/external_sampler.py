#!/usr/bin/env python3
"""An example external sampler for assay, standard library only.

A static-target SMC sampler: N particles from N(0, s0^2 I), Gaussian random-walk moves with
L-kernel = the proposal (so the weight update is pi(x_k) / pi(x_{k-1})), systematic resampling
when the ESS falls below ess_threshold * N. It speaks assay's JSON Lines protocol on
stdin/stdout (see the README, "External samplers"): it reads one job line, asks assay for log
densities with "evaluate" lines, and ends with one "result" line. Diagnostics go to stderr,
which assay keeps in a per-run log.
"""
import json
import math
import random
import sys


def ask(points):
    """Send one batch of points, return their log densities (None -> -inf)."""
    sys.stdout.write(json.dumps({"kind": "evaluate", "points": points}) + "\n")
    sys.stdout.flush()
    reply = json.loads(sys.stdin.readline())
    if reply.get("kind") != "log_density":
        raise SystemExit("unexpected reply: %r" % reply)
    return [(-math.inf if v is None else v) for v in reply["values"]]


def logsumexp(xs):
    m = max(xs)
    if m == -math.inf:
        return -math.inf
    return m + math.log(sum(math.exp(x - m) for x in xs))


def main():
    job = json.loads(sys.stdin.readline())
    d, n, seed = job["dim"], job["particles"], job["seed"]
    s = job["settings"]
    s0 = s.get("initial_scale", 1.0)
    scale = s.get("proposal_scale", 0.5)
    iterations = s.get("iterations", 20)
    threshold = s.get("ess_threshold", 0.5)
    rng = random.Random(seed)

    x = [[rng.gauss(0.0, s0) for _ in range(d)] for _ in range(n)]
    lp = ask(x)
    logq = [-0.5 * sum(v * v for v in p) / s0 ** 2 - d * math.log(s0) - 0.5 * d * math.log(2 * math.pi) for p in x]
    logw = [a - b for a, b in zip(lp, logq)]
    log_z = 0.0
    resamples = 0
    for _ in range(1, iterations):
        lse = logsumexp(logw)
        w = [math.exp(v - lse) for v in logw]
        ess = 1.0 / sum(v * v for v in w)
        if ess < threshold * n:
            log_z += lse - math.log(n)
            u, cum, j, idx = rng.random() / n, w[0], 0, []
            for i in range(n):
                while u + i / n > cum and j < n - 1:
                    j += 1
                    cum += w[j]
                idx.append(j)
            x = [list(x[j]) for j in idx]
            lp = [lp[j] for j in idx]
            logw = [0.0] * n
            resamples += 1
        x_new = [[v + scale * rng.gauss(0.0, 1.0) for v in p] for p in x]
        lp_new = ask(x_new)
        logw = [a + b - c for a, b, c in zip(logw, lp_new, lp)]
        x, lp = x_new, lp_new
    lse = logsumexp(logw)
    log_z += lse - math.log(n)
    w = [math.exp(v - lse) for v in logw]
    mean = [sum(wi * p[i] for wi, p in zip(w, x)) for i in range(d)]
    cov = [[sum(wi * (p[i] - mean[i]) * (p[j] - mean[j]) for wi, p in zip(w, x)) for j in range(d)] for i in range(d)]
    print("done: %d resamples" % resamples, file=sys.stderr)
    sys.stdout.write(json.dumps({"kind": "result", "mean": mean, "covariance": cov,
                                 "log_evidence": log_z, "kish_ess": 1.0 / sum(v * v for v in w),
                                 "resamples": resamples}) + "\n")
    sys.stdout.flush()


if __name__ == "__main__":
    main()
