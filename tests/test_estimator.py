"""The estimator's data age on a link whose device clock drifts.

Common practice: crystal oscillators are specified to tens of ppm, so a
device clock may run slow against the host by that much; a healthy link must
not look stale after an hour because of it. A real stall must still show.
"""

import numpy as np

from drivers.base import Sample
from runtime.realtime.estimator import Estimator
from sim_rigs import RIGS

nominal_model = RIGS["pedestal"].nominal_model


def run(estimator: Estimator, seconds: float, period: float, drift: float,
        stall_at: float | None = None, stall: float = 0.0) -> list[float]:
    """Feed samples whose device clock runs slow by `drift` (fractional); return the ages."""
    ages = []
    t_host = 10.0
    for k in range(int(seconds / period)):
        t_dev = k * period * (1.0 - drift)
        t_host = 10.0 + k * period + 150e-6  # constant transit
        now = t_host
        if stall_at is not None and abs(k * period - stall_at) < period / 2:
            now += stall  # the host handles this sample late
        y = (0.0, 0.0, 0.0, 0.0)
        estimator.update(Sample(seq=k, t_device=t_dev, y=y, t_host=t_host), now)
        ages.append(estimator.age)
    return ages


def test_a_slow_device_clock_does_not_age_the_data():
    A, _, _ = nominal_model()
    est = Estimator(A, 0.001, jump_limit=[1.0] * 4)
    ages = run(est, seconds=60.0, period=0.001, drift=50e-6)  # 50 ppm slow, a minute
    # Without creep the age would reach 60 s * 50e-6 = 3 ms, past 3 periods.
    assert max(ages[1000:]) < 0.5e-3


def test_a_stall_still_shows_in_the_age():
    A, _, _ = nominal_model()
    est = Estimator(A, 0.001, jump_limit=[1.0] * 4)
    ages = run(est, seconds=5.0, period=0.001, drift=0.0, stall_at=3.0, stall=0.02)
    assert max(ages) >= 0.019
    assert np.median(ages) < 1e-4


def test_a_sample_with_the_wrong_reading_count_is_refused_as_lost():
    """A well-formed sample one reading short (3 of 4) once crashed the loop. The serial and
    MQTT links refuse it against the hello; the estimator refuses it too, whatever link
    brought it: the estimate is held, the data ages (the stale rule's signal), and later
    good samples are used again."""
    A, _, _ = nominal_model()
    est = Estimator(A, 0.001, jump_limit=[1.0] * 4)
    good = (0.1, 0.0, 0.2, 0.0)
    est.update(Sample(seq=0, t_device=0.0, y=good, t_host=10.0), 10.0)
    held = est.x.copy()
    for k in range(1, 6):
        est.update(Sample(seq=k, t_device=k * 1e-3, y=good[:3], t_host=10.0 + k * 1e-3),
                   10.0 + k * 1e-3)
    assert est.refused == 5 and not est.received
    assert np.array_equal(est.x, held)
    assert est.age >= 5e-3 - 1e-9  # five periods without a usable reading
    est.update(Sample(seq=6, t_device=6e-3, y=good, t_host=10.006), 10.006)
    assert est.received and est.age < 1e-3
