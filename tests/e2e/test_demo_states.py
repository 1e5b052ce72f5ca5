"""The demo's segments match the warehouse scenario's operating states.

The scenario is our own invented data (daemon/demo/scenario.py); this checks that the core,
warmed up and then learning stepwise as the service does, ends with one segment per
operating state, each close to that state's true mean.
"""

import numpy as np

from shoal.core import StepSchedule, initialise
from shoal.daemon.demo import scenario


def test_segments_match_the_scenarios_states():
    rows = scenario.generate(40_000, seed=0)
    X = np.column_stack([rows[f] for f in scenario.FEATURES])
    model = initialise(X[:2000], 4, "full", seed=0, n_init=5,
                       schedule=StepSchedule(half_life_rows=50_000))
    model, scores = model.learn(X[2000:])
    truth = scenario.describe_states(include_new_state=False)
    names = list(scenario.STATES)
    true_means = np.array([[truth[s][f] for f in scenario.FEATURES] for s in names])
    # distance from each segment's mean to each state's mean, in the segment's own sds
    dist = np.sqrt((((model.data_means()[:, None, :] - true_means[None]) / model.data_stds()[:, None, :]) ** 2).mean(axis=2))
    nearest = dist.argmin(axis=1)
    assert sorted(nearest.tolist()) == [0, 1, 2, 3], [names[i] for i in nearest]
    assert dist[np.arange(4), nearest].max() < 0.5
    # and the labels agree with the true states row by row
    labelled = np.array(names)[nearest[scores.component]]
    agreement = np.mean(labelled == rows["state"][2000:])
    assert agreement > 0.95


def test_segments_match_the_states_with_the_demos_transforms():
    # the demo config's transforms (door_open_s: log1p); the model learns in the
    # transformed units, the centres are compared in the data's units (medians)
    from shoal.core import FeatureTransforms
    from shoal.daemon.demo.command import DEMO_CONFIG
    from shoal.daemon.model.transforming import centres

    kinds = [DEMO_CONFIG["transforms"].get(f, "none") for f in scenario.FEATURES]
    assert "log1p" in kinds
    transforms = FeatureTransforms.from_kinds(kinds)
    rows = scenario.generate(40_000, seed=0)
    Y, inside = transforms.forward(np.column_stack([rows[f] for f in scenario.FEATURES]))
    assert inside.all()          # the door is never open a negative time
    model = initialise(Y[:2000], 4, "full", seed=0, n_init=5,
                       schedule=StepSchedule(half_life_rows=50_000))
    model, scores = model.learn(Y[2000:])
    centre, low, high = centres(transforms, model.data_means(), model.data_stds())
    truth = scenario.describe_states(include_new_state=False)
    names = list(scenario.STATES)
    true_means = np.array([[truth[s][f] for f in scenario.FEATURES] for s in names])
    # distance in each segment's own spread (for door_open_s half its 68% interval)
    half = (high - low) / 2.0
    dist = np.sqrt((((centre[:, None, :] - true_means[None]) / half[:, None, :]) ** 2)
                   .mean(axis=2))
    nearest = dist.argmin(axis=1)
    assert sorted(nearest.tolist()) == [0, 1, 2, 3], [names[i] for i in nearest]
    assert dist[np.arange(4), nearest].max() < 0.5
    labelled = np.array(names)[nearest[scores.component]]
    agreement = np.mean(labelled == rows["state"][2000:])
    print(f"agreement with the true states: {agreement:.4f}")
    assert agreement > 0.95
