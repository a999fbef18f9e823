"""Built-in synthetic scenarios: named recordings the demo, the benchmarks and the tests share.

Each scenario is a :func:`artifactclean.synthetic.simulate_recording` call
with the parameters of one kind of rig. They are invented data, for
demonstration and for measuring the estimators against a known truth.
"""

from __future__ import annotations

from .synthetic import ArtifactSpec, BlockSpec, NeuralSpec, SyntheticRecording, UnitSpec, simulate_recording

__all__ = ["SCENARIOS", "make_scenario", "locked_units"]


def locked_units(kappa: float = 1.0) -> list[UnitSpec]:
    """Four units, one per channel; the first is locked to the stimulation (von Mises ``kappa``)."""
    return [
        UnitSpec(channel=0, rate_hz=15.0, amplitude_uv=100.0, shape="narrow", kappa=kappa, preferred_phase=1.0),
        UnitSpec(channel=1, rate_hz=15.0, amplitude_uv=80.0, shape="broad"),
        UnitSpec(channel=2, rate_hz=15.0, amplitude_uv=120.0, shape="narrow"),
        UnitSpec(channel=3, rate_hz=15.0, amplitude_uv=90.0, shape="broad"),
    ]


def _modulated(freq: float, dac: float | None, clip: float | None = None) -> ArtifactSpec:
    # 4 mV, harmonics, 2 % heartbeat at ~2 Hz, 1 % respiration, 40 ppm drift
    return ArtifactSpec(freq_hz=freq, amplitude_uv=4000.0, heart_depth=0.02, resp_depth=0.01,
                        drift_ppm=40.0, dac_rate_hz=dac, clip_uv=clip,
                        channel_gains=(1.0, -0.7, 0.45, -1.2))


def make_scenario(name: str, *, seed: int = 0, duration_s: float = 20.0) -> SyntheticRecording:
    """Build the scenario ``name`` (see :data:`SCENARIOS`) with ``seed``.

    Raises
    ------
    ValueError
        For an unknown scenario name (the message lists the known ones).
    """
    if name not in SCENARIOS:
        raise ValueError(f"unknown scenario {name!r}; choose one of {sorted(SCENARIOS)}")
    artifact, blocks = SCENARIOS[name]
    return simulate_recording(duration_s, artifact=artifact, neural=NeuralSpec(units=locked_units()),
                              blocks=None if blocks is None else blocks(duration_s), seed=seed)


def _sham_then_active(d: float) -> list[BlockSpec]:
    return [BlockSpec(start_s=1.0, duration_s=2.0, kind="sham", ramp_s=1.0),
            BlockSpec(start_s=4.0, duration_s=d - 5.0, ramp_s=1.0)]


#: name -> (artifact parameters, block layout as a function of the duration or None for one block)
SCENARIOS: dict = {
    **{f"modulated_{f}hz": (_modulated(float(f), None), None) for f in (5, 10, 20, 40)},
    **{f"modulated_{f}hz_dac": (_modulated(float(f), 1000.0), None) for f in (5, 10, 20, 40)},
    "clipped_20hz_dac": (_modulated(20.0, 1000.0, clip=3600.0), None),
    "sham_then_active_10hz": (_modulated(10.0, None), _sham_then_active),
}
