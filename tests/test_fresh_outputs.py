"""Every kernel writes every element of the outputs it allocates.

Fresh outputs of 64 KiB and more come from ``numpy.empty`` (no zero fill), so
an element a kernel forgot to write would hold whatever the allocator left
there. With ``ROLLSCAN_DEBUG_POISON_OUTPUTS=1`` every fresh output starts as
all-ones bytes (NaN, or -1 for int64); the script below, run in a child
process with that switch, compares each kernel's fresh outputs with the same
call writing into zero-filled ``out=`` buffers: any unwritten element shows
as NaN / -1 against 0. Common practice, no source: the two calls must agree
bit for bit because they run the same code on the same inputs.
"""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap

SCRIPT = textwrap.dedent(
    """
    import numpy as np
    import rollscan
    from rollscan import ragged

    rng = np.random.default_rng(11)
    checked = 0

    def same(name, fresh, into):
        global checked
        fresh = fresh if isinstance(fresh, tuple) else (fresh,)
        into = into if isinstance(into, tuple) else (into,)
        assert len(fresh) == len(into), name
        for k, (a, b) in enumerate(zip(fresh, into)):
            a, b = np.asarray(a), np.asarray(b)
            assert a.shape == b.shape and a.dtype == b.dtype, (name, k)
            assert np.array_equal(a, b), f"{name}: output {k} differs where out= was 0"
        checked += 1

    def both(name, f, outs):
        # outs: shapes and dtypes of the outputs, as zero-filled buffers
        zeros = tuple(np.zeros(s, d) for s, d in outs)
        same(name, f(None), f(zeros if len(zeros) > 1 else zeros[0]))

    for dt in (np.float32, np.float64):
        for t_len, n in ((7, 3), (400, 64)):
            r = rng.normal(size=(t_len, n)).astype(dt)
            v = rng.normal(size=(t_len, n)).astype(dt)
            te = rng.random((t_len, n)) < 0.05
            tr = rng.random((t_len, n)) < 0.03
            nv = rng.normal(size=(t_len, n)).astype(dt)
            sh = [((t_len, n), dt)]
            both("discounted_returns", lambda o: rollscan.discounted_returns(
                r, te, gamma=0.97, truncated=tr, next_values=nv, out=o), sh)
            both("discounted_returns F-order", lambda o: rollscan.discounted_returns(
                np.asfortranarray(r), te, gamma=0.97, bootstrap=v[0], out=o), sh)
            for norm in (False, True):
                both("gae", lambda o: rollscan.gae(
                    r, v, te, gamma=0.97, lam=0.9, truncated=tr, next_values=nv,
                    normalize=norm, out=o), sh * 2)
            both("gae time_axis=1", lambda o: rollscan.gae(
                r.T, v.T, te.T, gamma=0.97, lam=0.9, bootstrap=v[0], time_axis=1,
                out=o), [((n, t_len), dt)] * 2)
            both("normalize", lambda o: rollscan.normalize(r, mask=te | tr, out=o), sh)
            blp = rng.uniform(-2, 0, size=(t_len, n)).astype(dt)
            tlp = (blp + rng.normal(scale=0.3, size=(t_len, n))).astype(dt)
            both("vtrace", lambda o: rollscan.vtrace(
                blp, tlp, r, v, te, gamma=0.97, bootstrap=v[0], out=o), sh * 2)
            s = rollscan.clipped_surrogate(tlp, blp, r)
            g = np.zeros((t_len, n), dt)
            s2 = rollscan.clipped_surrogate(tlp, blp, r, out=g)
            same("clipped_surrogate grad", s.grad, s2.grad)

            flat_r, flat_v = r.ravel(), v.ravel()
            lengths = np.diff(np.r_[0, np.sort(rng.choice(flat_r.size, 20, replace=False)), flat_r.size])
            term = rng.random(lengths.size) < 0.5
            tails = rng.normal(size=lengths.size).astype(dt)
            fs = [((flat_r.size,), dt)]
            both("ragged.discounted_returns", lambda o: ragged.discounted_returns(
                flat_r, lengths, gamma=0.97, terminal=term, tail_values=tails, out=o), fs)
            both("ragged.gae", lambda o: ragged.gae(
                flat_r, flat_v, lengths, gamma=0.97, lam=0.9, terminal=term,
                tail_values=tails, out=o), fs * 2)
            both("ragged.episode_sums", lambda o: ragged.episode_sums(
                flat_r, lengths, gamma=0.9, out=o), [((lengths.size,), dt)])

        for b, k in ((5, 4), (3000, 18)):
            x = rng.normal(size=(b, k)).astype(dt)
            y = rng.normal(size=(b, k)).astype(dt)
            a = rng.integers(0, k, size=b)
            m = rng.random((b, k)) < 0.8
            m[np.arange(b), a] = True
            row, full = [((b,), dt)], [((b, k), dt)]
            for mask in (None, m):
                both("categorical_log_prob", lambda o: rollscan.categorical_log_prob(
                    x, a, mask=mask, out=o), row)
                both("categorical_entropy", lambda o: rollscan.categorical_entropy(
                    x, mask=mask, out=o), row)
                both("categorical_log_prob_entropy", lambda o: rollscan.categorical_log_prob_entropy(
                    x, a, mask=mask, out=o), row * 2)
                both("categorical_kl", lambda o: rollscan.categorical_kl(
                    x, y, mask=mask, out=o), row)
                both("categorical_score", lambda o: rollscan.categorical_score(
                    x, a, mask=mask, out=o), full)
                both("categorical_sample", lambda o: rollscan.categorical_sample(
                    x, seed=3, mask=mask, out=o), [((b,), np.int64)])
                both("categorical_mode", lambda o: rollscan.categorical_mode(
                    x, mask=mask, out=o), [((b,), np.int64)])
            ls = (0.3 * rng.normal(size=k)).astype(dt)
            lsf = (0.3 * rng.normal(size=(b, k))).astype(dt)
            for log_std in (ls, lsf):
                both("gaussian_log_prob", lambda o: rollscan.gaussian_log_prob(
                    x, log_std, y, out=o), row)
                both("gaussian_entropy", lambda o: rollscan.gaussian_entropy(
                    np.broadcast_to(log_std, (b, k)), out=o), row)
                both("gaussian_log_prob_entropy", lambda o: rollscan.gaussian_log_prob_entropy(
                    x, log_std, y, out=o), row * 2)
                both("gaussian_kl", lambda o: rollscan.gaussian_kl(
                    x, log_std, y, lsf, out=o), row)
                both("gaussian_score", lambda o: rollscan.gaussian_score(
                    x, log_std, y, out=o), full * 2)
                both("gaussian_sample", lambda o: rollscan.gaussian_sample(
                    x, log_std, seed=5, out=o), full)
                act = np.tanh(y) * 0.999
                both("squashed_gaussian_log_prob", lambda o: rollscan.squashed_gaussian_log_prob(
                    x, log_std, act, out=o), row)
                both("squashed_gaussian_sample", lambda o: rollscan.squashed_gaussian_sample(
                    x, log_std, seed=5, low=-2.0, high=3.0, out=o), full * 2)
    # The normalisers allocate through the same path (no out= to compare
    # with: their results are finite wherever written, and chunking must not
    # change them).
    rm = rollscan.RunningMoments((64,))
    x = rng.normal(size=(3000, 64))
    rm.update(x)
    z = rm.normalize(x)
    assert np.isfinite(z).all()
    np.testing.assert_allclose(z, (x - rm.mean) / (rm.std + 1e-8), rtol=1e-12, atol=1e-12)
    rr = rng.normal(size=(3000, 64))
    dd = rng.random((3000, 64)) < 0.01
    whole = rollscan.ReturnScaler(64, gamma=0.99).scale(rr, dd)
    sc = rollscan.ReturnScaler(64, gamma=0.99)
    parts = np.concatenate([sc.scale(rr[i:i + 7], dd[i:i + 7]) for i in range(0, 3000, 7)])
    assert np.isfinite(whole).all()
    assert np.array_equal(whole, parts)
    checked += 2
    print("checked", checked)
    """
)


def test_fresh_outputs_are_fully_written():
    env = dict(os.environ, ROLLSCAN_DEBUG_POISON_OUTPUTS="1")
    res = subprocess.run(
        [sys.executable, "-c", SCRIPT], env=env, capture_output=True, text=True, timeout=300
    )
    assert res.returncode == 0, res.stderr[-4000:]
    checked = int(res.stdout.split()[-1])
    assert checked > 150, res.stdout


def test_poison_switch_is_read():
    # Without this the test above could pass with the switch silently off.
    code = "from rollscan import _core; print(_core._debug_outputs_poisoned())"
    for value, want in (("1", "True"), ("0", "False")):
        env = dict(os.environ, ROLLSCAN_DEBUG_POISON_OUTPUTS=value)
        res = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
        assert res.returncode == 0, res.stderr
        assert res.stdout.strip() == want
