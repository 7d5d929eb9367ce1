"""The cheap randomization check gives the values of the full cascade.

Every layer of the cascade is re-initialised from its own seed, so re-initialising all layers at once (the
default, ``cascade_steps = 1``) reaches exactly the model at the end of the full cascade: the values must
agree with the full cascade's to 1e-12 (stated tolerance; in practice they are bit-identical), at 1/L of the
explainer re-runs."""

from __future__ import annotations

import numpy as np
import pytest

from xbench.explainers import ExplainContext, explain
from xbench.metrics import MetricInputs, compute_metric
from xbench.models.base import counting_all

TOLERANCE = 1e-12

pytestmark = pytest.mark.usefixtures("one_torch_thread")


@pytest.mark.parametrize("explainer", ["gradient", "occlusion"])
def test_cheap_cascade_equals_the_full_cascade(trained_small, explainer):
    handle = trained_small.handle
    test = trained_small.data.test
    images = test.images[:5]
    targets = test.labels[:5].astype(np.int64)
    settings = {"window": 8, "stride": 8} if explainer == "occlusion" else {}
    context = ExplainContext(seed=3, batch_size=32)

    def rerun(model, ims, t, tiles=None):
        return explain(explainer, model, ims, t, context=context, **settings).attributions

    maps = rerun(handle, images, targets)
    values, calls = {}, {}
    for steps in ("all", 3, 1):
        inputs = MetricInputs(maps, images, targets, model=handle, rerun_explainer=rerun, seed=2)
        with counting_all() as c:
            (sp,) = compute_metric("randomization-spearman", inputs, cascade_steps=steps)
            (ss,) = compute_metric("randomization-ssim", inputs, cascade_steps=steps)
        values[steps] = (sp.values, ss.values)
        calls[steps] = c.forward
        labels = sp.curve_labels["randomization-spearman"]
        assert sp.curves["randomization-spearman"].shape == (5, len(labels))
        assert labels[-1] == "conv1"  # the last step is always the fully randomized model
        if steps == "all":
            full_labels = labels
    n_layers = len(full_labels)
    assert n_layers >= 5
    for steps in (3, 1):
        for full, cheap in zip(values["all"], values[steps], strict=True):
            assert np.isfinite(full).all()
            np.testing.assert_allclose(cheap, full, rtol=0, atol=TOLERANCE)
    # the explainer re-runs (and so the model calls) shrink with the steps: L, 3 and 1 re-runs
    assert calls["all"] == n_layers * calls[1] and calls[3] == 3 * calls[1] > 0
    # the value is the size of the similarity: 0 = the map moved completely (toward 0 is better)
    assert np.all((values[1][0] >= 0) & (values[1][0] <= 1))


def test_cascade_steps_is_validated(trained_small):
    handle = trained_small.handle
    images = trained_small.data.test.images[:2]
    targets = np.zeros(2, np.int64)
    inputs = MetricInputs(np.ones((2,) + images.shape[2:], np.float32), images, targets, model=handle)
    inputs.rerun_explainer = lambda model, ims, t, tiles=None: np.ones((len(ims),) + ims.shape[2:])
    from xbench.errors import XbenchInputError

    with pytest.raises(XbenchInputError, match="cascade_steps"):
        compute_metric("randomization-spearman", inputs, cascade_steps=0)
