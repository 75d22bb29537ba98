"""V_p at high precision with mpmath: the dense path sum of small depths, no chunking.

Straight from the definitions in Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759
(2022) (SK) and Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306 (mixed q):

    G_0[j,k] = sum_a f(a) a_j a_k
    M = Gamma_j Gamma_k xi'(G_{m-1}[j,k]);  w(a) = f(a) exp(-1/2 a^T M a);  G_m = sum_a w a_j a_k
    V_p = i sum_j Gamma_j xi(G_p[time 0, j])

evaluated with mpmath (Johansson et al., mpmath, a Python library for arbitrary-precision
floating-point arithmetic) at a working precision chosen by the caller, so values far below
the double range (e.g. exp(-5000)) and sums with heavy cancellation come out right.
Cost 2^(2p+1) paths x p steps in software arithmetic: p <= 3 only.
"""

from __future__ import annotations

import itertools

import mpmath


def _paths(p: int):
    return [tuple(1 - 2 * bit for bit in bits) for bits in itertools.product((0, 1), repeat=2 * p + 1)]


def _f(path, p: int, beta):
    out = mpmath.mpf("0.5")
    for t in range(2 * p):
        angle = mpmath.mpf(beta[t] if t < p else beta[2 * p - 1 - t])
        sign = 1 if t < p else -1
        if path[t] == path[t + 1]:
            out *= mpmath.cos(angle)
        else:
            out *= sign * 1j * mpmath.sin(angle)
    return out


def _poly(weights: dict, x, order: int):
    total = mpmath.mpc(0)
    for q, w in weights.items():
        if q < order:
            continue
        coef = mpmath.mpf(w)
        for k in range(order):
            coef *= q - k
        total += coef * x ** (q - order)
    return total


def precise_run(weights: dict, gamma, beta, dps: int = 60) -> dict:
    """V_p and diagnostics at ``dps`` decimal digits.

    weights : {q: w} of xi(x) = sum w x^q (exact decimal strings are fine)
    Returns {"value": mpf V_p, "max_abs_w": per step, "sum_abs_w": per step}.
    """
    with mpmath.workdps(dps):
        g = [mpmath.mpf(x) for x in gamma]
        b = [mpmath.mpf(x) for x in beta]
        p = len(g)
        n = 2 * p + 1
        Gam = g + [mpmath.mpf(0)] + [-x for x in reversed(g)]
        paths = _paths(p)
        f = [_f(a, p, b) for a in paths]
        G = [[sum(fa * a[j] * a[k] for fa, a in zip(f, paths)) for k in range(n)] for j in range(n)]
        max_abs, sum_abs = [], []
        for _ in range(p):
            M = [[Gam[j] * Gam[k] * _poly(weights, G[j][k], 1) for k in range(n)] for j in range(n)]
            w = []
            for fa, a in zip(f, paths):
                e = sum(a[j] * M[j][k] * a[k] for j in range(n) for k in range(n))
                w.append(fa * mpmath.exp(-e / 2))
            max_abs.append(max(abs(x) for x in w))
            sum_abs.append(sum(abs(x) for x in w))
            G = [[sum(wa * a[j] * a[k] for wa, a in zip(w, paths)) for k in range(n)] for j in range(n)]
        V = 1j * sum(Gam[j] * _poly(weights, G[p][j], 0) for j in range(n))
        return {"value": +V.real, "imag": +V.imag, "max_abs_w": max_abs, "sum_abs_w": sum_abs}


def precise_sparse(q: int, degree, gamma, beta, dps: int = 50):
    """nu_p(D; gamma, beta) of Max-q-XORSAT on a D-regular hypertree, at ``dps`` digits.

    The tree recursion of Basso, Farhi, Marwaha, Villalonga, Zhou (TQC 2022, arXiv:2110.14206)
    and Basso, Gamarnik, Mei, Zhou (FOCS 2022, arXiv:2204.10306), written as plain XOR sums
    over the 2^(2p+1) paths (no transforms, no log1p):

        H_0 = 1;  H_m(a) = [ sum_{b_1..b_{q-1}} prod_i f(b_i) H_{m-1}(b_i) cos(phase(a b_1 .. b_{q-1}) / 2) ]^(D-1)
        <Z> = sum_{a_1..a_q} prod_i f(a_i) H_p(a_i) (a_i)_0  i sin(phase(a_1 .. a_q) / 2);  nu = 1/2 + <Z>/2

    with phase(c) = Gamma . c.  Returns (nu as mpf, max_m |sum_a f H_m - 1|).  p <= 2 only.
    """
    with mpmath.workdps(dps):
        g = [mpmath.mpf(x) for x in gamma]
        b = [mpmath.mpf(x) for x in beta]
        D = mpmath.mpf(degree)
        p = len(g)
        n = 2 * p + 1
        N = 2**n
        Gam = g + [mpmath.mpf(0)] + [-x for x in reversed(g)]
        paths = _paths(p)  # index x <-> bits of x, first site = most significant bit
        f = [_f(a, p, b) for a in paths]
        phase = [sum(G * s for G, s in zip(Gam, a)) for a in paths]

        def xor_conv(u, v):
            out = [mpmath.mpc(0)] * N
            for x in range(N):
                if u[x] == 0:
                    continue
                for y in range(N):
                    out[x ^ y] += u[x] * v[y]
            return out

        H = [mpmath.mpf(1)] * N
        dev = mpmath.mpf(0)
        for _ in range(p):
            u = [fa * h for fa, h in zip(f, H)]
            dev = max(dev, abs(sum(u) - 1))
            conv = u
            for _ in range(q - 2):
                conv = xor_conv(conv, u)
            H = [sum(conv[c] * mpmath.cos(phase[a ^ c] / 2) for c in range(N)) ** (D - 1) for a in range(N)]
        u = [fa * h for fa, h in zip(f, H)]
        dev = max(dev, abs(sum(u) - 1))
        u0 = [x * paths[i][p] for i, x in enumerate(u)]  # times the spin at time 0 (position p)
        conv = u0
        for _ in range(q - 1):
            conv = xor_conv(conv, u0)
        corr = sum(conv[x] * 1j * mpmath.sin(phase[x] / 2) for x in range(N))
        return +(mpmath.mpf("0.5") + corr.real / 2), dev
