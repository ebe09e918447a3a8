"""The whole simulated batch: conservation, grid convergence, equilibrium yield, seeds, mismatch."""

from __future__ import annotations

import dataclasses

import pytest

from sensor.shell.config import BATCH_PHASES
from simulators.errors import SimulatorError
from simulators.kinetics import Mismatch
from simulators.plant import PlantSimulation, seeded_mismatch
from tests.simulators.conftest import shortened


def _run_batch(sim):
    truths = []
    while not sim.finished:
        sim.step()
        truths.append(sim.truth())
    return truths


@pytest.fixture(scope="module")
def demo_batch(demo_site):
    sim = PlantSimulation.from_site(demo_site, seed=3)
    return sim, _run_batch(sim)


def test_solute_is_conserved_over_a_whole_batch(demo_batch):
    # Dissolved + solid - seed charged stays what was charged, to 1e-6 relative (the issue's
    # target; by construction it holds to rounding), through dissolution of the charge,
    # seeding, growth and nucleation.
    sim, truths = demo_batch
    charged = sim.charged
    worst = max(
        abs(t.conc + t.solids_kg_per_kg_solvent - t.seed_added_kg_per_kg_solvent - charged)
        for t in truths
    )
    assert worst / charged < 1e-6
    assert min(t.growth_rate_m_per_s for t in truths) < 0.0  # dissolution happened
    assert max(t.growth_rate_m_per_s for t in truths) > 0.0  # and growth
    assert max(t.nucleation_rate_per_kg_s for t in truths) > 0.0  # and nucleation
    assert truths[-1].seed_added_kg_per_kg_solvent == pytest.approx(3.0 / 1600.0, rel=1e-12)


def test_the_demo_batch_is_plausible(demo_batch):
    _sim, truths = demo_batch
    assert list(dict.fromkeys(t.phase for t in truths)) == list(BATCH_PHASES)
    assert 9.0 < truths[-1].time_s / 3600 < 11.0
    by_phase = {t.phase: t for t in truths}  # the last instant of each phase
    assert by_phase["dissolve"].solids_kg_per_kg_solvent < 1e-8  # all dissolved
    # inside the metastable zone throughout after seeding: no primary burst
    seeded = [t for t in truths if t.seed_added_kg_per_kg_solvent > 0]
    assert max(t.sigma / t.sigma_limit for t in seeded) < 1.0
    final = truths[-1]
    assert final.sigma == pytest.approx(0.0, abs=0.01)
    assert 50.0 < final.mean_size_um < 500.0


def test_halving_the_size_step_changes_the_final_mean_size_under_one_percent(
    demo_site, demo_settings
):
    sizes = []
    for classes in (300, 600):  # the demo batch, 5 um then 2.5 um classes
        grid = dataclasses.replace(demo_settings.grid, size_classes=classes)
        settings = dataclasses.replace(demo_settings, grid=grid)
        sim = PlantSimulation.from_site(demo_site, seed=1, settings=settings)
        sizes.append(_run_batch(sim)[-1].mean_size_um)
    assert sizes[1] == pytest.approx(sizes[0], rel=0.01)


def test_a_long_final_hold_reaches_the_equilibrium_yield(demo_site, demo_settings):
    # Common practice: after a long hold the solids are c0 - c_sat(T_final) per kg solvent
    # (plus the seed), within 0.5 %.
    settings = shortened(demo_settings, final_hold_s=4 * 3600.0)
    sim = PlantSimulation.from_site(demo_site, seed=2, settings=settings)
    final = _run_batch(sim)[-1]
    c_sat = sim.plant_solubility.c_sat(final.temp_c + 273.15)
    expected = sim.charged + final.seed_added_kg_per_kg_solvent - c_sat
    assert final.solids_kg_per_kg_solvent == pytest.approx(expected, rel=0.005)


def test_the_same_seed_gives_the_same_batch_and_another_seed_another(demo_site, short_settings):
    def readings(seed):
        sim = PlantSimulation.from_site(demo_site, seed=seed, settings=short_settings)
        return [dict(s.readings) for s in sim.advance_to(600.0)]

    assert readings(5) == readings(5)
    assert readings(5) != readings(6)


def test_mismatch_moves_the_plant_within_its_bounds(demo_site, short_settings):
    drawn = [seeded_mismatch(seed, 0.5, 1.0) for seed in range(40)]
    assert all(0.5 <= m.growth_factor <= 1.5 and abs(m.solubility_offset_k) <= 1.0 for m in drawn)
    assert max(m.growth_factor for m in drawn) > 1.3
    assert min(m.growth_factor for m in drawn) < 0.7
    plant = PlantSimulation.from_site(
        demo_site, settings=short_settings, mismatch=Mismatch(1.4, 0.6, 1.0, 1.0, 0.8)
    )
    nominal = PlantSimulation.from_site(demo_site, settings=short_settings, mismatch=Mismatch())
    k_p, k_n = plant.crystallizer.kinetics, nominal.crystallizer.kinetics
    assert k_p.growth_rate_constant_m_per_s == pytest.approx(1.4 * k_n.growth_rate_constant_m_per_s)
    assert k_p.secondary_rate_constant_per_kg_s == pytest.approx(
        0.6 * k_n.secondary_rate_constant_per_kg_s
    )
    # c_sat^plant(T) = c_sat^site(T + 0.8 K)
    assert plant.plant_solubility.c_sat(310.0) == pytest.approx(
        nominal.plant_solubility.c_sat(310.8), rel=1e-9
    )
    with pytest.raises(SimulatorError, match=r"growth_factor: must be 0.5 to 1.5; got 1.6"):
        Mismatch(growth_factor=1.6)
    with pytest.raises(SimulatorError, match=r"solubility offset must be 0 to 1 K"):
        seeded_mismatch(0, 0.1, 1.5)


def test_stepping_api(demo_site, short_settings):
    sim = PlantSimulation.from_site(demo_site, seed=1, settings=short_settings, batch_id="B-1")
    samples = sim.advance_to(60.0)
    assert [s.time_s for s in samples] == [float(k) for k in range(1, 61)]
    assert sim.time_s == 60.0
    assert sim.timestamp().isoformat() == "2026-03-14T06:01:00+00:00"
    assert samples[-1].readings["batch_id"].value == "B-1"
    assert samples[-1].readings["phase"].value == 1  # heat, as the DCS's phase value
    # the analyzer grabs every 10 s (10 s, 20 s, ...) and reports 30 s later
    assert [s.time_s for s in samples if "conc" in s.readings] == [40.0, 50.0, 60.0]
    sim.set_inputs(permissive=True, heartbeat=4)
    sim.step()
    assert sim.step().readings["permissive"].value is True
    assert sim.inputs.heartbeat == 4
    centres, counts = sim.size_distribution()
    assert centres.shape == counts.shape == (short_settings.grid.size_classes,)
    while not sim.finished:  # bounded: the short recipe ends in under 3 h
        sim.step()
    with pytest.raises(SimulatorError, match=r"batch B-1 finished at"):
        sim.step()
