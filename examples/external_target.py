#!/usr/bin/env python3
"""An example external target for assay, standard library only.

Invented scenario: the posterior of two calibration offsets (a, b) of an invented strain-gauge
bridge, which we pretend to know only as a log density computed by a program. It is in fact
the correlated Gaussian N(mu, Sigma) with mu = (1.0, -0.5), Sigma = [[1.0, 0.6], [0.6, 0.5]],
unnormalised as exp(-q/2), so the study can state its exact reference values:
log Z = log(2 pi) + 1/2 log|Sigma| with |Sigma| = 0.14.

Protocol (see the README, "External targets"): read lines {"kind":"evaluate","points":[..]},
answer each with {"kind":"log_density","values":[..]} in the same order; exit at end of input.
"""
import json
import sys

MU = (1.0, -0.5)
S11, S12, S22 = 1.0, 0.6, 0.5
DET = S11 * S22 - S12 * S12
P11, P12, P22 = S22 / DET, -S12 / DET, S11 / DET


def log_density(p):
    a, b = p[0] - MU[0], p[1] - MU[1]
    return -0.5 * (P11 * a * a + 2 * P12 * a * b + P22 * b * b)


def main():
    for line in sys.stdin:
        msg = json.loads(line)
        if msg.get("kind") != "evaluate":
            continue
        values = [None if any(v is None for v in p) else log_density(p) for p in msg["points"]]
        sys.stdout.write(json.dumps({"kind": "log_density", "values": values}) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
