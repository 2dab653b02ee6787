"""Every answer right or refused: exported columns held to their own promise.

Two kinds of wrong results that every state's tolerance let through (tests/benchmarks/
adversarial_sweep.py found them): a cumulative amount of a small compartment whose magnitude scale
came from the amount a large reservoir beside it holds (the error builds up over many steps), and
a flux column, a small difference of two face states times a large conductance. The networks are
invented (drawn by ``tests/random_networks.py`` and the sweep's extreme patches), written out here.
The reference is scipy's Radau IIA at rtol 1e-10, atol 1e-13 of each state's scale, on the same
grid (Hairer and Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8);
the accuracy contract is that of /work/shared/spec/benchmark.md (a concentration or flux within
1e-5 of its peak, a cumulative amount within 1e-6 of its final value), each column judged on its
peak, at least 1e-4 of the run's largest amount in its units (``test_small_columns.contract_errors``).
"""

from __future__ import annotations

import numpy as np
import pytest
from test_small_columns import contract_errors, population_errors, reference

import barrierflow as bf
from barrierflow import SolverError
from barrierflow.engine import RosenbrockIntegrator, ScipyIntegrator, solve
from barrierflow.engine.ledger import derived_over
from barrierflow.engine.population import sample_scenarios

# A compartment of 30 uL with saturable elimination (km 1e-5 mg/mL), fed by infusions and by an
# exchange from a 15.6 L reservoir holding 1.5e5 mg (random network 387 of the sweep). Its scale
# came from the part's amount bound over its volume, 5e6 mg/mL: the default (RODAS4) ended the
# eliminated amount 0.42 mg off Radau's 378 mg, 1.1e3 times the contract, every state within
# 3e-6 of its scale and the ledger closed.
INFUSED_BESIDE_A_RESERVOIR = """
[scenario]
name = "random network (invented)"
duration = "113.36486522342277 h"
output_step = "4.198698711978621 h"

[[compartment]]
id = "c0"
volume = "0.0297071615878752 mL"
partition = 0.5532076048973773
vmax = "3.3356327048963754 mg/h"
km = "1.0156635704755957e-05 mg/mL"

[[compartment]]
id = "c1"
volume = "0.06691519571830454 mL"
partition = 1.0412499407601483
clearance = "0.011077391347743555 mL/h"

[[compartment]]
id = "c2"
volume = "15623.776280628637 mL"
initial_concentration = "9.467710517119556 mg/mL"
partition = 3.999110813533576

[[compartment]]
id = "c3"
partition = 1.275055005392859
held_concentration = "0 mg/mL"

[[barrier]]
id = "b0"
from = "c1"
to = "c0"
area = "0.10601921871414687 cm^2"

[[barrier.layer]]
thickness = "0.008512062834045734 cm"
diffusivity = "7.280892356689408e-05 cm^2/h"
partition = 0.14615755144664475
cells = 2

[[exchange]]
id = "x0"
from = "c2"
to = "c0"
flow = "1.5110983716727602 mL/h"

[[dose]]
target = "c0"
kind = "infusion"
rate = "10.736102122449484 mg/h"
duration = "8.223649014720412 h"
every = "51.8543655795184 h"
count = 4
"""

# The benchmark's patch with seven layers (the last thin and fast, K 0.17) and output times from
# 1e-12 to 1e-2 of the run around a bolus into the body (extreme patch 95 of the sweep). The face
# cell beside the body (scale 1.7 mg/mL, peak 6e-7) was 30 % off at the row 7e-7 h after the bolus,
# and the flux column, 1.2e3 times that cell, 2.9e4 times the contract (0.29 of its peak).
NEAR_A_BOLUS = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "72 h"
output_times = [
    "0 h", "7.2 h", "14.4 h", "16.814099567349675 h",
    "17.526899567349673 h", "17.534027567349675 h", "17.534098847349675 h", "17.534099560149674 h",
    "17.534099567277675 h", "17.534099567349674 h", "17.534099567421674 h", "17.534099574549675 h",
    "17.534100287349673 h", "17.534171567349674 h", "17.541299567349675 h", "18.254099567349673 h",
    "21.6 h", "28.8 h", "36 h", "43.2 h",
    "50.4 h", "57.6 h", "64.8 h", "72 h",
]
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"

[[barrier.layer]]
thickness = "0.00013881262768720656 cm"
diffusivity = "0.0007060820529072388 cm^2/h"
partition = 59.74517710130794

[[barrier.layer]]
thickness = "0.0010606373287680422 cm"
diffusivity = "1.8997116667133309e-06 cm^2/h"
partition = 2.5036825410108237

[[barrier.layer]]
thickness = "0.0027018640060218215 cm"
diffusivity = "2.51814711097768e-08 cm^2/s"
partition = 0.7655003844571481
cells = 1

[[barrier.layer]]
thickness = "0.0005762527969635836 cm"
diffusivity = "0.0006954505078577644 cm^2/h"
partition = 0.3427016499318081

[[barrier.layer]]
thickness = "0.0008433799807792144 cm"
diffusivity = "0.005037210574468754 cm^2/h"
partition = 0.05475921961762751

[[barrier.layer]]
thickness = "0.06507151667292524 cm"
diffusivity = "9.120426634827984e-07 cm^2/h"
partition = 0.8086167623756311

[[barrier.layer]]
thickness = "0.0001904363412795472 cm"
diffusivity = "0.0010764802274965115 cm^2/h"
partition = 0.1675956793911476

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"

[[dose]]
target = "central"
kind = "bolus"
amount = "0.017945143719527684 mg"
at = "17.534099567349674 h"
"""


# The benchmark's patch beside a steady barrier with a transfer, and output times from 1e-12 to
# 1e-2 of the run around a bolus of 0.7 mg into the body (extreme patch 84 of the sweep). RODAS4's
# first step after the bolus (1.0e-4 h, its error estimate 0.99) passed over the rows 2.4e-7 and
# 2.4e-5 h after it and read them from its dense output, which is not exact in the stiff limit: the
# face cell beside the body, still relaxing from the bolus, came out off by a part of its jump and
# the flux through 'skin' 78 times the contract off (row 2.4e-5 h after the bolus). Every state's
# tolerance met it, so no check of the result could tell. The step now ends at such a row.
BOLUS_INSIDE_A_FIRST_STEP = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "24 h"
output_times = [
    "0 h", "2.4 h", "4.8 h", "7.199999999999999 h", "9.6 h", "11.39806826873435 h",
    "11.635668268734351 h", "11.638044268734351 h", "11.63806802873435 h", "11.63806826633435 h",
    "11.63806826871035 h", "11.63806826873435 h", "11.638068268758351 h", "11.638068271134351 h",
    "11.638068508734351 h", "11.63809226873435 h", "11.64046826873435 h", "11.878068268734351 h",
    "12 h", "14.399999999999999 h", "16.8 h", "19.2 h", "21.599999999999998 h", "24 h",
]
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[compartment]]
id = "depot"
volume = "35.48369314760135 mL"
initial_concentration = "2.7518487714425195 mg/mL"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"

[[barrier.layer]]
thickness = "15 um"
diffusivity = "3.6000000000000003e-06 cm^2/h"
partition = 10.0

[[barrier.layer]]
thickness = "100 um"
diffusivity = "1e-06 cm^2/s"

[[barrier.layer]]
thickness = "1 mm"
diffusivity = "1e-06 cm^2/s"

[[barrier]]
id = "wall"
from = "depot"
to = "central"
area = "3.878911717004006 cm^2"
model = "steady"

[[barrier.layer]]
thickness = "0.05436205010236295 cm"
diffusivity = "1.7701936711929325e-06 cm^2/h"
partition = 0.44427067071083154

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"

[[transfer]]
id = "t"
from = "peripheral"
to = "depot"
rate = "0.057406458204272655 1/h"

[[dose]]
target = "central"
kind = "bolus"
amount = "0.706211607960641 mg"
at = "11.63806826873435 h"
"""


def _contract(text: str) -> tuple[str, float]:
    s = bf.loads(text)
    try:
        res = bf.simulate(s)
    except SolverError:
        return "refused", 0.0  # a refusal is an answer; a wrong number is not
    errors = contract_errors(res, reference(s, res))
    worst = max(errors, key=errors.get)
    return worst, errors[worst]


def test_a_small_compartment_beside_a_reservoir_meets_the_contract():
    # its scale is now also bounded by the potentials its part's sources can set (1.2e4 mg/mL)
    s = bf.loads(INFUSED_BESIDE_A_RESERVOIR)
    assert bf.simulate(s).trajectory.model.scale[0] < 1e5  # mg/mL (was 5e6)
    worst, err = _contract(INFUSED_BESIDE_A_RESERVOIR)
    assert err <= 1.0, (worst, err)  # against scipy Radau (was 1.1e3 on eliminated:c0)


def test_a_flux_near_a_bolus_meets_the_contract():
    worst, err = _contract(NEAR_A_BOLUS)
    assert err <= 1.0, (worst, err)  # against scipy Radau (was 2.9e4 on flux:skin)


def test_rows_inside_the_first_step_after_a_bolus_meet_the_contract():
    """Output rows a short time after an event, inside RODAS4's first steps there, against scipy's
    Radau IIA (rtol 1e-10; Hairer and Wanner, Solving Ordinary Differential Equations II, 2nd ed.,
    1996, sec. IV.8) on the same grid, every column within the contract of
    /work/shared/spec/benchmark.md: the default and RODAS4 without the guard's second attempt (the
    integrator's own result; before, the flux through 'skin' 78 times the contract off)."""
    s = bf.loads(BOLUS_INSIDE_A_FIRST_STEP)
    default = bf.simulate(s)
    ref = reference(s, default)
    for res in (default, bf.simulate(s, integrator=RosenbrockIntegrator(), grid=default.trajectory.grid,
                                     fallback=False)):
        errors = contract_errors(res, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (res.integrator, worst, errors[worst])


def test_the_flux_is_named_when_the_run_is_computed_again():
    # the face's conductance times the face cell's atol * scale was 838 times the promise on the
    # flux's peak; the run is computed again on the robust integrator at scales from what it
    # reached, and the message says why
    tr = solve(bf.loads(NEAR_A_BOLUS))
    assert tr.status == 0 and tr.stats["fallbacks"] >= 1
    assert "the flux of barrier 'skin'" in tr.message
    assert "computed again with rodas4 at tighter tolerances" in tr.message


def test_population_fluxes_near_a_bolus_meet_the_contract():
    """A population's subjects are held to the same promise on their flux columns as a single run:
    a subject whose flux's tolerance is far above its promise is computed again alone (as its
    single run), never returned wrong with status 0. Each subject's flux (and every kept column)
    against scipy's Radau IIA (rtol 1e-10; Hairer and Wanner 1996, sec. IV.8) on its own, judged
    on its peak, at least 1e-4 of the run's largest amount over the area and the duration (the
    contract of /work/shared/spec/benchmark.md). Before, the RODAS4 population returned every
    subject with status 0 and its flux through 'skin' 2.9e4 times the contract off."""
    s = bf.loads(NEAR_A_BOLUS)
    vary = {"compartment.central.clearance": 0.3}
    pop = bf.simulate_population(s, vary, 3, seed=3, integrator=RosenbrockIntegrator())
    subjects, _ = sample_scenarios(s, vary, 3, seed=3)
    for i, sub in enumerate(subjects):
        if pop.status[i] != 0:
            assert "failed its check" in pop.messages[i]
            continue
        ref = bf.simulate(sub, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-13), fallback=False)
        assert np.array_equal(pop.times, ref.times)
        mb = ref.mass_balance
        big = max(abs(mb.initial), abs(mb.dosed), abs(mb.held_supply), abs(mb.removed))
        flux = ref.flux("skin")
        peak = max(float(np.max(np.abs(flux))), 1e-4 * big / sub.barriers[0].area / sub.duration)
        err = float(np.max(np.abs(pop.flux("skin")[i] - flux))) / peak / 1e-5
        assert err <= 1.0, (i, err, pop.messages[i])  # was 2.9e4
        errors = population_errors(pop, i, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (i, worst, errors[worst], pop.messages[i])
    assert any("the flux of barrier 'skin'" in m for m in pop.messages), pop.messages


# The patch with nine layers, one of 200 cells and one degrading fast (extreme patch 92 of the sweep).
# Its flux's tolerance is 173 times its promise and RODAS4's result meets the contract; flagged (at
# a factor of 100) and computed again on the exact chain path (which has no tolerances but rounds
# at about 1e-7 of each state's scale), the eliminated amount, 6e-8 mg at its peak, came back 43
# times the contract off. The default keeps a result that meets the contract.
NINE_LAYERS = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "72 h"
output_step = "1.44 h"
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"

[[barrier.layer]]
thickness = "0.00012129031897247552 cm"
diffusivity = "0.002511636218924565 cm^2/h"
partition = 0.036785536568492996

[[barrier.layer]]
thickness = "0.0006570724596288097 cm"
diffusivity = "3.760023382690296e-05 cm^2/h"
partition = 1.5170977660353764

[[barrier.layer]]
thickness = "0.041202588693120816 cm"
diffusivity = "8.252791361115936e-07 cm^2/h"
partition = 0.9601211751598335

[[barrier.layer]]
thickness = "0.0077877301328600525 cm"
diffusivity = "2.039509766948426e-06 cm^2/h"
partition = 73.10040385742855

[[barrier.layer]]
thickness = "0.0013966738793571645 cm"
diffusivity = "0.0013736142551830555 cm^2/h"
partition = 0.02706194307668784

[[barrier.layer]]
thickness = "0.00010197633909864951 cm"
diffusivity = "1.9914984548399696e-06 cm^2/h"
partition = 0.06521679335293049

[[barrier.layer]]
thickness = "0.0002466289472951246 cm"
diffusivity = "1.5673814651658112e-06 cm^2/h"
partition = 42.998089495986406

[[barrier.layer]]
thickness = "0.016089686617118425 cm"
diffusivity = "3.777826199079608e-05 cm^2/h"
partition = 4.426316719285651

[[barrier.layer]]
thickness = "0.0010230604143948055 cm"
diffusivity = "0.0001389916619793471 cm^2/h"
partition = 0.025168723584174386

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"
"""


def test_a_flux_within_the_factor_keeps_its_accurate_result():
    worst, err = _contract(NINE_LAYERS)
    assert err <= 1.0, (worst, err)  # against scipy Radau (43 on eliminated:central from the chain path)


# The patch with ten layers, the third 24 um thick (extreme patch 806 of the sweep), a linear chain.
# RODAS4's result lets the eliminated amount through its tolerance (5.64 times its promise); computed
# again on the exact chain path (no tolerances, but rounding at about 1e-7 of each state's scale,
# 2.8e-8 here) the eliminated amount came back 52.6 times the contract off scipy Radau, returned
# with exit 0. The robust integrator with scales from what the run reached refuses it instead.
TEN_LAYERS = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "72 h"
output_step = "0.16666666666666666 h"
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"

[[barrier.layer]]
thickness = "0.00010025903103372936 cm"
diffusivity = "0.024615508401689714 cm^2/h"
partition = 0.733468644737288

[[barrier.layer]]
thickness = "0.0012645512129742674 cm"
diffusivity = "4.10075469241208e-06 cm^2/h"
partition = 2.0022757655966217

[[barrier.layer]]
thickness = "0.010101350138118272 cm"
diffusivity = "5.3627347674042074e-06 cm^2/h"
partition = 52.61167191952135

[[barrier.layer]]
thickness = "0.002158379041820594 cm"
diffusivity = "0.0005267909365664912 cm^2/h"
partition = 0.033189235530946375

[[barrier.layer]]
thickness = "0.0013622369514308473 cm"
diffusivity = "0.02274986258851553 cm^2/h"
partition = 24.188469783551767

[[barrier.layer]]
thickness = "0.048835802542555394 cm"
diffusivity = "4.674038280846779e-05 cm^2/h"
partition = 0.012251084801523487

[[barrier.layer]]
thickness = "0.0002625683507453358 cm"
diffusivity = "1.642668382666389e-06 cm^2/h"
partition = 0.04486498616797655

[[barrier.layer]]
thickness = "0.0006456760651106462 cm"
diffusivity = "0.0002726405586641473 cm^2/h"
partition = 13.391592002848975

[[barrier.layer]]
thickness = "0.020613005217704764 cm"
diffusivity = "7.690825078406e-08 cm^2/s"
partition = 0.09568384845385208

[[barrier.layer]]
thickness = "0.0035921167622833664 cm"
diffusivity = "0.00023716229083060202 cm^2/h"
partition = 14.33723008350429

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"

"""


def test_a_small_eliminated_amount_on_a_chain_network_is_right_or_refused():
    worst, err = _contract(TEN_LAYERS)
    assert err <= 1.0, (worst, err)  # against scipy Radau (52.6 on eliminated:central from the chain path)


# The benchmark's patch with ten layers, a body clearance of 3.7 L/h, a bolus of 4.3 ug into the
# body at 82.7 h with output rows from 1.7e-6 h to 1.7 h either side of it, and the patch replaced
# every 84 h (extreme patch 217 of the sweep). The exact path declines it (modes too
# ill-conditioned); the robust RODAS4 run keeps the model's own scales, and the skin's face cell on
# the body's side, scale 6030 mg/mL, holds 2e-5 of it: the flux's tolerance is 176 times its
# promise, below DERIVED_EXCESS, and rescaling shrinks it 2.7e5-fold. The default returned the
# flux through 'skin' 176 times the contract off.
TEN_LAYERS_BOLUS_NEAR_A_ROW = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "168 h"
output_times = ["0 h", "16.8 h", "33.6 h", "50.400000000000006 h", "67.2 h", "81.01734206381015 h",
                "82.68054206381015 h", "82.69717406381015 h", "82.69734038381016 h", "82.69734204701015 h",
                "82.69734206364215 h", "82.69734206381015 h", "82.69734206397816 h", "82.69734208061016 h",
                "82.69734374381015 h", "82.69751006381016 h", "82.71414206381016 h", "84 h", "84.37734206381016 h",
                "100.80000000000001 h", "117.60000000000001 h", "134.4 h", "151.20000000000002 h", "168 h"]
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "3739.0550834014666 mL/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"
[[barrier.layer]]
thickness = "0.011387825281408411 cm"
diffusivity = "0.0007304682068977827 cm^2/h"
partition = 0.016115180289314086

[[barrier.layer]]
thickness = "0.0068169499318225905 cm"
diffusivity = "1.5632354883493932e-06 cm^2/h"
partition = 0.010852088945337566

[[barrier.layer]]
thickness = "0.0019123653224635846 cm"
diffusivity = "6.748116204727728e-07 cm^2/h"
partition = 0.2821001271336233

[[barrier.layer]]
thickness = "0.004758717413318105 cm"
diffusivity = "4.4742410454119596e-06 cm^2/h"
partition = 0.4545128771646441

[[barrier.layer]]
thickness = "0.0002898789844122615 cm"
diffusivity = "3.891044146346769e-05 cm^2/h"
partition = 0.7049130302665157

[[barrier.layer]]
thickness = "0.010193844332390763 cm"
diffusivity = "1.1935969811357941e-05 cm^2/h"
partition = 0.013506204840826274

[[barrier.layer]]
thickness = "0.0003756276235531836 cm"
diffusivity = "0.003947425815937477 cm^2/h"
partition = 53.08440077303249

[[barrier.layer]]
thickness = "0.0017386309812699946 cm"
diffusivity = "6.855698377166782e-07 cm^2/h"
partition = 0.9085320470620135

[[barrier.layer]]
thickness = "0.02378245938610884 cm"
diffusivity = "2.963717466440361e-05 cm^2/h"
partition = 1.898744874739167

[[barrier.layer]]
thickness = "0.0007271811492948437 cm"
diffusivity = "4.789143146122592e-05 cm^2/h"
partition = 40.52604710592196

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"

[[dose]]
target = "central"
kind = "bolus"
amount = "4.25798162199866 ug"
at = "82.69734206381015 h"

[[dose]]
target = "patch"
kind = "replace"
concentration = "69.39226762682037 mg/mL"
at = "84 h"
every = "84 h"

"""

# Two held compartments linked by two barriers and two exchanges, a 12 uL compartment with
# saturable elimination emptied at 11.1 h and refilled at 18.6 h (random network 1112 of the
# sweep's generator, tests/random_networks.py). RODAS4's flux through 'b0' had a tolerance 189
# times its promise, rescaling would shrink it more than 1e3-fold; the default returned the amount
# that passed 'b0' 4.0e3 times the contract off.
HELD_SIDES_REFILLED = """
[scenario]
name = "random network (invented)"
duration = "46.05060469502721 h"
output_step = "2.1928859378584384 h"

[[compartment]]
id = "c0"
partition = 0.7236881426850362
held_concentration = "0.12697229036759472 mg/mL"

[[compartment]]
id = "c1"
partition = 3.2670695918560098
held_concentration = "0.02137775676614372 mg/mL"

[[compartment]]
id = "c2"
volume = "0.011878008485142966 mL"
initial_concentration = "3.886726596375385 mg/mL"
partition = 0.2540461258734619
clearance = "0.25635518196687407 mL/h"
vmax = "0.8478756206910674 mg/h"
km = "0.02292990872378059 mg/mL"

[[barrier]]
id = "b0"
from = "c1"
to = "c2"
area = "0.2886949700371638 cm^2"

[[barrier.layer]]
thickness = "0.0003680473775997824 cm"
diffusivity = "8.607186315532531e-08 cm^2/h"
partition = 7.910696340954761
cells = 3

[[barrier.layer]]
thickness = "0.0053339330905980056 cm"
diffusivity = "9.353371444684511e-06 cm^2/h"
partition = 4.170615184912413
cells = 5

[[barrier.layer]]
thickness = "0.07172286026107053 cm"
diffusivity = "0.007288986264025896 cm^2/h"
partition = 0.2004253623055032
cells = 8

[[barrier]]
id = "b1"
from = "c0"
to = "c1"
area = "0.7999444124948013 cm^2"

[[barrier.layer]]
thickness = "0.00010209631879937528 cm"
diffusivity = "4.659224587599535e-05 cm^2/h"
partition = 17.909979839974376
cells = 7

[[exchange]]
id = "x0"
from = "c1"
to = "c0"
flow = "10.214126195903365 mL/h"

[[exchange]]
id = "x1"
from = "c1"
to = "c0"
flow = "1717.6085806044787 mL/h"

[[transfer]]
id = "t0"
from = "c2"
to = "c0"
rate = "0.014381190181821706 1/h"

[[dose]]
target = "c2"
kind = "replace"
concentration = "0.16440920981372475 mg/mL"
at = "18.55804756464668 h"

[[dose]]
target = "c2"
kind = "remove"
at = "11.055759319457907 h"

"""


# The benchmark's patch with seven thin layers (the deepest 0.067 cm thick, diffusivities down to
# 5.7e-7 cm^2/h) and an infusion of 441 mg/h into the body for 75 s at 11.4 h (extreme patch 2310 of
# the sweep). The flux's tolerance is 69.5 times its promise, from scales a rescale shrinks
# 7.5e3-fold: below DERIVED_TOLERANCE at 100, the default returned the flux through 'skin' 14.8
# times the contract off.
SEVEN_LAYERS_SHORT_INFUSION = """
[scenario]
name = "adversarial patch to body (invented)"
duration = "24 h"
output_step = "0.48 h"
check_ranges = false

[[compartment]]
id = "patch"
volume = "1 mL"
initial_concentration = "10 mg/mL"

[[compartment]]
id = "central"
volume = "5 L"
clearance = "10 L/h"

[[compartment]]
id = "peripheral"
volume = "20 L"

[[barrier]]
id = "skin"
from = "patch"
to = "central"
area = "10 cm^2"

[[barrier.layer]]
thickness = "0.004364184209560242 cm"
diffusivity = "0.02585301439457564 cm^2/h"
partition = 1.119442872348599

[[barrier.layer]]
thickness = "0.00017990218619038954 cm"
diffusivity = "0.0032893052297393063 cm^2/h"
partition = 0.021680024027689208

[[barrier.layer]]
thickness = "0.0001515907385194664 cm"
diffusivity = "2.1320364179215337e-06 cm^2/h"
partition = 0.015037538918903772

[[barrier.layer]]
thickness = "0.0023880756872064774 cm"
diffusivity = "8.472173205641324e-07 cm^2/h"
partition = 5.885595887669599

[[barrier.layer]]
thickness = "0.00019506655911703544 cm"
diffusivity = "5.725525431634253e-07 cm^2/h"
partition = 5.034546656960897

[[barrier.layer]]
thickness = "0.003914254312500057 cm"
diffusivity = "3.464623069302105e-05 cm^2/h"
partition = 12.688388784001665

[[barrier.layer]]
thickness = "0.06729199199453094 cm"
diffusivity = "4.709907849704958e-06 cm^2/h"
partition = 2.2390039781256563

[[exchange]]
id = "x"
from = "central"
to = "peripheral"
flow = "5 L/h"

[[dose]]
target = "central"
kind = "infusion"
rate = "441.1461204302949 mg/h"
duration = "0.02090499567449727 h"
at = "11.397278375760925 h"

"""


def _converged(s: bf.Scenario, res: bf.Result) -> bf.Result:
    """scipy's Radau IIA (Hairer and Wanner, Solving Ordinary Differential Equations II, 2nd ed.,
    1996, sec. IV.8) at rtol 1e-10 and atol 1e-15 of each state's scale, on ``res``'s grid. The
    sweep's atol 1e-13 is not converged on the first two networks (the default was 1.97 and 1.34 times
    the contract off it, 0.31 and 0.36 off this one, which agrees with atol 1e-17 within 2 %):
    face cells hold 1e-5 of their scale there."""
    return bf.simulate(s, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-15), grid=res.trajectory.grid,
                       fallback=False)


@pytest.mark.parametrize(("text", "before"), [(TEN_LAYERS_BOLUS_NEAR_A_ROW, "176 on flux:skin"),
                                              (HELD_SIDES_REFILLED, "4.0e3 on permeated:b0"),
                                              (SEVEN_LAYERS_SHORT_INFUSION, "14.8 on flux:skin")],
                         ids=["ten-layers-bolus", "held-sides-refilled", "seven-layers-infusion"])
def test_derived_columns_from_scales_far_off_meet_the_contract(text, before):
    """A flux whose tolerance is 65 to 500 times its promise (below DERIVED_EXCESS), from scales
    estimated far above what its face cells reached (a rescale shrinks it more than
    DERIVED_SHRINK-fold), is computed again at observed scales while a rescale remains
    (``ledger.derived_over``); every exported column within the contract of
    /work/shared/spec/benchmark.md against scipy's Radau (:func:`_converged`)."""
    s = bf.loads(text)
    res = bf.simulate(s)
    errors = contract_errors(res, _converged(s, res))
    worst = max(errors, key=errors.get)
    assert errors[worst] <= 1.0, (worst, errors[worst], before)


def test_the_second_rule_applies_only_while_a_rescale_remains():
    # the figures of the two networks above and of the benchmark's cases (tolerance over promise,
    # shrink by observed scales), as the guard measured them
    assert derived_over(176.0, 2.7e5, True) and derived_over(189.0, 1.3e3, True)
    assert derived_over(69.5, 7.5e3, True)  # extreme patch 2310 (14.8 times the contract off)
    assert not derived_over(64.0, 7.5e3, True)  # below DERIVED_TOLERANCE
    assert not derived_over(176.0, 2.7e5, False)  # after the last rescale: the first rule alone
    assert derived_over(838.0, 1e3, False)  # the first rule stands after it (extreme patch 95)
    assert not derived_over(76.0, 216.0, True)  # the star of 64's fluxes (accurate)
    assert not derived_over(102.0, 478.0, True)  # the membrane wash-off on Radau at 12 cells (accurate)
    assert not derived_over(902.0, 173.0, True)  # a flux a rescale cannot help (accurate)


def test_the_flux_from_scales_far_off_is_named():
    tr = solve(bf.loads(TEN_LAYERS_BOLUS_NEAR_A_ROW))
    assert tr.status == 0
    assert "the flux of barrier 'skin'" in tr.message
    assert "with absolute tolerances from the magnitudes it reached" in tr.message


def test_population_fluxes_from_scales_far_off_meet_the_contract():
    """A population's subjects are held to the second rule too (one rule, ``ledger.derived_over``):
    on the robust integrator's tolerances (rtol 1e-8, atol 1e-11) each subject's flux through
    'skin' has a tolerance 176 times its promise, from scales a rescale would shrink 2.7e5-fold,
    so each is computed again alone at observed scales. Each subject's flux (and every kept
    column) against scipy's Radau IIA (rtol 1e-10, atol 1e-15; Hairer and Wanner 1996, sec. IV.8)
    on its own, as in :func:`test_population_fluxes_near_a_bolus_meet_the_contract`. Before, every
    subject came back with status 0 and its flux about 175 times the contract off."""
    s = bf.loads(TEN_LAYERS_BOLUS_NEAR_A_ROW)
    vary = {"compartment.central.clearance": 0.3}
    pop = bf.simulate_population(s, vary, 2, seed=3, integrator=RosenbrockIntegrator(rtol=1e-8, atol=1e-11))
    subjects, _ = sample_scenarios(s, vary, 2, seed=3)
    for i, sub in enumerate(subjects):
        assert pop.status[i] == 0, pop.messages[i]
        ref = bf.simulate(sub, integrator=ScipyIntegrator("Radau", rtol=1e-10, atol=1e-15), fallback=False)
        assert np.array_equal(pop.times, ref.times)
        mb = ref.mass_balance
        big = max(abs(mb.initial), abs(mb.dosed), abs(mb.held_supply), abs(mb.removed))
        flux = ref.flux("skin")
        peak = max(float(np.max(np.abs(flux))), 1e-4 * big / sub.barriers[0].area / sub.duration)
        err = float(np.max(np.abs(pop.flux("skin")[i] - flux))) / peak / 1e-5
        assert err <= 1.0, (i, err, pop.messages[i])
        errors = population_errors(pop, i, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (i, worst, errors[worst])


# Four random networks of tests/random_networks.py (random cases 1183, 1206, 1487 and 1828 of the
# adversarial sweep), each with a cumulative amount whose peak stays below 1e-4 of the run's largest
# amount (the magnitude floor: check_magnitudes leaves it out) and whose tolerance on RODAS4 is 30 to
# 40 times the promise on that floor. The default (RODAS4) returned them 13.2, 36.0, 16.3 and 15.2
# times the contract off scipy's Radau, every state within its tolerance: their error estimates,
# summed over the accepted steps, were 308, 68, 36 and 266 times that promise
# (ledger.floor_tolerances, rosenbrock.FLOOR_EXCESS).
PASSED_FROM_A_COMPARTMENT_EMPTIED_IN_SECONDS = """
[scenario]
name = "random network (invented)"
duration = "7.629823925319263 h"
output_step = "0.23843199766622697 h"

[[compartment]]
id = "c0"
volume = "21540.90870118432 mL"
partition = 1.8366788392716082

[[compartment]]
id = "c1"
volume = "0.02938757228374027 mL"
initial_concentration = "0.015227145089836261 mg/mL"
partition = 2.826292467075805

[[compartment]]
id = "c2"
volume = "0.042800585909928864 mL"
initial_concentration = "0.008328865833791489 mg/mL"
partition = 4.330127409144041
clearance = "5604.254787548726 mL/h"
vmax = "0.07590048483562889 mg/h"
km = "0.0002771911185764797 mg/mL"

[[barrier]]
id = "b0"
from = "c1"
to = "c0"
area = "0.12455449166245176 cm^2"
model = "steady"

[[barrier.layer]]
thickness = "0.03950713728365176 cm"
diffusivity = "7.5987525065331194e-06 cm^2/h"
partition = 0.605826893340686
cells = 4

[[barrier.layer]]
thickness = "0.0010284614363679334 cm"
diffusivity = "0.008787834740830744 cm^2/h"
partition = 0.09133254409149597
cells = 5

[[barrier.layer]]
thickness = "0.00017431192830662508 cm"
diffusivity = "8.447826119222081e-06 cm^2/h"
partition = 0.020963089354189435
cells = 5

[[barrier]]
id = "b1"
from = "c2"
to = "c1"
area = "10.0821028328483 cm^2"

[[barrier.layer]]
thickness = "0.0005060841109993325 cm"
diffusivity = "2.770444397391754e-07 cm^2/h"
partition = 19.885890929969253
cells = 6

[[barrier.layer]]
thickness = "0.1403708862665657 cm"
diffusivity = "0.027164568924353854 cm^2/h"
partition = 65.19765723121645
cells = 5

[[barrier.layer]]
thickness = "0.0019908761785863527 cm"
diffusivity = "2.3433563098576537e-07 cm^2/h"
partition = 16.13196032512136
cells = 5

[[exchange]]
id = "x0"
from = "c0"
to = "c1"
flow = "773.5250202534568 mL/h"

[[transfer]]
id = "t0"
from = "c2"
to = "c1"
rate = "0.039469410395162705 1/h"

"""

ELIMINATED_BESIDE_A_FAST_EXCHANGE = """
[scenario]
name = "random network (invented)"
duration = "1.7081959491996352 h"

[[compartment]]
id = "c0"
volume = "3252.335920323069 mL"
partition = 0.1144721445621104

[[compartment]]
id = "c1"
volume = "1527.8173627104823 mL"
partition = 4.467573609199607
vmax = "0.006221235138265324 mg/h"
km = "0.014807062854351256 mg/mL"

[[compartment]]
id = "c2"
volume = "11.23197217930636 mL"
initial_concentration = "0.04007428058651273 mg/mL"
partition = 0.4792166500233581

[[exchange]]
id = "x0"
from = "c1"
to = "c2"
flow = "30.68790452214458 mL/h"

[[exchange]]
id = "x1"
from = "c2"
to = "c0"
flow = "14908.96136468166 mL/h"

[[transfer]]
id = "t0"
from = "c0"
to = "c1"
rate = "0.04231427396067456 1/h"

[[dose]]
target = "c2"
kind = "bolus"
amount = "60.171366589877174 mg"
at = "0.5331964873056528 h"

[[dose]]
target = "c1"
kind = "bolus"
amount = "0.04309137364933852 mg"
every = "0.7889730409947662 h"

"""

DEGRADED_BESIDE_A_LATE_BOLUS = """
[scenario]
name = "random network (invented)"
duration = "0.9809768383860078 h"
output_step = "0.03269922794620026 h"

[[compartment]]
id = "c0"
volume = "0.04253677485905145 mL"
partition = 0.20737198570047435
clearance = "139.06594078102688 mL/h"
vmax = "1.8967759097293313 mg/h"
km = "0.2129251157680184 mg/mL"

[[compartment]]
id = "c1"
volume = "0.20004777867315626 mL"
initial_concentration = "0.0015828928463324293 mg/mL"
partition = 1.7330676270925325
clearance = "0.22006756973361372 mL/h"

[[barrier]]
id = "b0"
from = "c0"
to = "c1"
area = "35.65295889661386 cm^2"

[[barrier.layer]]
thickness = "393.539191412189 um"
diffusivity = "4.944370331461659e-05 cm^2/h"
partition = 0.224038556030271
cells = 2

[[barrier.layer]]
thickness = "0.10422271039697174 cm"
diffusivity = "5.451404267669553e-06 cm^2/h"
partition = 7.053238342804179
cells = 4
degradation_rate = "3.291404843963361 1/h"

[[barrier]]
id = "b1"
from = "c0"
to = "c1"
area = "0.019985771674249177 cm^2"

[[barrier.layer]]
thickness = "0.05892213299605234 cm"
diffusivity = "3.378181376336354e-06 cm^2/h"
partition = 0.03253649971161508
cells = 8

[[barrier.layer]]
thickness = "0.0027084495224934642 cm"
diffusivity = "4.3539802215666035e-07 cm^2/h"
partition = 6.618282794136001
cells = 3

[[transfer]]
id = "t0"
from = "c0"
to = "c1"
rate = "0.014865224486116201 1/h"

[[dose]]
target = "c0"
kind = "bolus"
amount = "85.72328754980775 mg"
at = "0.5077721408597194 h"

"""

PASSED_TO_A_HELD_SINK = """
[scenario]
name = "random network (invented)"
duration = "55.331939274254495 h"
output_step = "1.7849012669114352 h"

[[compartment]]
id = "c0"
volume = "10.783651120751637 mL"
initial_concentration = "0.22057676232856058 mg/mL"
partition = 0.5910215198463022
clearance = "36.26741609866971 mL/h"
vmax = "0.001118533432927619 mg/h"
km = "0.37220267790609207 mg/mL"

[[compartment]]
id = "c1"
volume = "0.1944109982177078 mL"
initial_concentration = "0.29459065532913753 mg/mL"
partition = 3.2290240677244704
clearance = "429.8698155023088 mL/h"

[[compartment]]
id = "c2"
volume = "0.0016837085759760053 mL"
initial_concentration = "0.33876439277983283 mg/mL"
partition = 0.3046060749054296
clearance = "8844.469144205785 mL/h"

[[compartment]]
id = "c3"
partition = 1.0575325558090243
held_concentration = "0 mg/mL"

[[compartment]]
id = "c4"
volume = "43708.9156144479 mL"
partition = 2.10281144301644

[[compartment]]
id = "c5"
volume = "0.09207737556256976 mL"
initial_concentration = "83.73356797772 mg/L"
partition = 0.14882774681869412
clearance = "161.60385201537284 mL/h"

[[barrier]]
id = "b0"
from = "c5"
to = "c4"
area = "0.7134166097616912 cm^2"

[[barrier.layer]]
thickness = "0.008385282706698536 cm"
diffusivity = "3.908504865618383e-08 cm^2/h"
partition = 22.37844127898632
cells = 4

[[barrier.layer]]
thickness = "0.003850525531838451 cm"
diffusivity = "0.0003226242475546754 cm^2/h"
partition = 22.182082843244512
cells = 8
degradation_rate = "1.839965388468366 1/h"

[[barrier.layer]]
thickness = "0.00012807257357062615 cm"
diffusivity = "2.7425519577813513e-08 cm^2/h"
partition = 0.2881348687222524
cells = 5
degradation_rate = "3.769009852337227 1/h"

[[barrier]]
id = "b1"
from = "c1"
to = "c4"
area = "38.84457778632643 cm^2"

[[barrier.layer]]
thickness = "0.12405832190915701 cm"
diffusivity = "4.613073013845183e-09 cm^2/h"
partition = 0.3593781231807826
cells = 5

[[barrier]]
id = "b2"
from = "c3"
to = "c2"
area = "7.866901855228299 cm^2"

[[barrier.layer]]
thickness = "0.00019382445756933409 cm"
diffusivity = "5.3706481723158565e-09 cm^2/h"
partition = 7.2857161605962935
cells = 3
degradation_rate = "0.009450614973955843 1/h"

[[barrier.layer]]
thickness = "0.07381576336217657 cm"
diffusivity = "6.346652426650582e-05 cm^2/h"
partition = 5.338916109295974
cells = 8
degradation_rate = "0.0033517261057942954 1/h"

[[transfer]]
id = "t0"
from = "c0"
to = "c3"
rate = "0.4930662134925419 1/h"

[[transfer]]
id = "t1"
from = "c5"
to = "c4"
rate = "0.0360099293555157 1/h"

[[dose]]
target = "c2"
kind = "infusion"
rate = "0.08506212738693508 mg/h"
duration = "10.65773380459174 h"
at = "11.995499916709711 h"

[[dose]]
target = "c2"
kind = "remove"
at = "32.78061940428659 h"

"""

FLOOR_CASES = [(PASSED_FROM_A_COMPARTMENT_EMPTIED_IN_SECONDS, "13.2 on permeated:b1"),
               (ELIMINATED_BESIDE_A_FAST_EXCHANGE, "36.0 on eliminated:c1"),
               (DEGRADED_BESIDE_A_LATE_BOLUS, "16.3 on degraded:b0"),
               (PASSED_TO_A_HELD_SINK, "15.2 on permeated:b2")]


@pytest.mark.parametrize(("text", "before"), FLOOR_CASES, ids=["random-1183", "random-1206", "random-1487",
                                                               "random-1828"])
def test_amounts_below_the_floor_on_rodas4_meet_the_contract(text, before):
    """A cumulative amount below the magnitude floor whose summed error estimates exceed
    FLOOR_EXCESS times its promise is computed again on RODAS4 with it and the states it comes from
    held to the floor; every exported column within the contract of /work/shared/spec/benchmark.md
    against scipy's Radau IIA (rtol 1e-10, atol 1e-13 and 1e-15 of each state's scale; Hairer and
    Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8) on the same grid."""
    s = bf.loads(text)
    res = bf.simulate(s)
    assert res.integrator == "rodas4" and "computed twice" in res.message
    for ref in (reference(s, res), _converged(s, res)):
        errors = contract_errors(res, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (worst, errors[worst], before)



# Random case 9 of the sweep (a random network of tests/random_networks.py): what compartment c0
# eliminated stays below the magnitude floor, its tolerance 30 times the promise on it, and its
# error estimates summed over the accepted steps come to 15.7 times that promise, below FLOOR_EXCESS:
# one run, within the contract.
ELIMINATED_BELOW_THE_FLOOR_ONCE = """
[scenario]
name = "random network (invented)"
duration = "98.55147276154308 h"
output_step = "3.285049092051436 h"

[[compartment]]
id = "c0"
volume = "0.030843214606789772 mL"
initial_concentration = "0.02255807554513216 mg/mL"
partition = 0.8461416454035497
clearance = "2.1785526560117936 mL/h"

[[compartment]]
id = "c1"
volume = "669.1721885845758 mL"
partition = 7.806041906723484
clearance = "9.080437308837014 mL/h"

[[compartment]]
id = "c2"
volume = "84697.13100222178 mL"
partition = 2.3816694499397517
clearance = "16249.789266607355 mL/h"
vmax = "0.0033861195802365514 mg/h"
km = "0.22836372726665413 mg/mL"

[[barrier]]
id = "b0"
from = "c0"
to = "c2"
area = "71.7877333350784 cm^2"
model = "steady"

[[barrier.layer]]
thickness = "0.0007594435875987233 cm"
diffusivity = "1.060555527307004e-07 cm^2/h"
partition = 0.1332716149258447
degradation_rate = "3.6166311874740855 1/h"

[[barrier.layer]]
thickness = "0.07995346177340994 cm"
diffusivity = "8.70618704854616e-09 cm^2/h"
partition = 0.3275409536801135
degradation_rate = "0.006279613065045596 1/h"

[[barrier.layer]]
thickness = "6.04593908901442 um"
diffusivity = "0.0005127878096409016 cm^2/h"
partition = 25.28869847024835

[[barrier]]
id = "b1"
from = "c2"
to = "c0"
area = "1.958450370601485 cm^2"

[[barrier.layer]]
thickness = "0.0002751961654927831 cm"
diffusivity = "0.009547831695609132 cm^2/h"
partition = 1.007426932652518

[[transfer]]
id = "t0"
from = "c0"
to = "c2"
rate = "0.03771320819992959 1/h"

[[dose]]
target = "c2"
kind = "infusion"
rate = "0.0018658039865476696 mg/h"
duration = "12.699439631672147 h"
at = "60.00684347608003 h"

[[dose]]
target = "c2"
kind = "infusion"
rate = "0.7523300955987343 mg/h"
duration = "1.1538236591454574 h"

"""


def test_an_amount_below_the_floor_with_small_estimates_is_computed_once():
    """The rule's other side: an amount below the floor whose summed error estimates stay below
    FLOOR_EXCESS times its promise is computed once, and meets the contract against scipy's Radau
    IIA (rtol 1e-10, atol 1e-13 and 1e-15; Hairer and Wanner 1996, sec. IV.8) on the same grid."""
    s = bf.loads(ELIMINATED_BELOW_THE_FLOOR_ONCE)
    res = bf.simulate(s)
    assert res.integrator == "rodas4" and "computed twice" not in res.message
    for ref in (reference(s, res), _converged(s, res)):
        errors = contract_errors(res, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (worst, errors[worst])


# A population whose subject on RODAS4 hits the rule for cumulative amounts below the floor (random
# case 1183 above) is held to it as the single run is: the rule (ledger.floor_candidates) applied
# to each subject's summed error estimates, and the subject computed again alone.
def test_a_population_subject_below_the_floor_is_checked_as_its_single_run():
    """Each subject (the network of random case 1183, twice) is flagged by RODAS4's rule for amounts
    below the magnitude floor and computed again alone, as its single run is computed twice; every
    kept column within the contract against scipy's Radau IIA (rtol 1e-10, atol 1e-15; Hairer and
    Wanner, Solving Ordinary Differential Equations II, 2nd ed., 1996, sec. IV.8)."""
    s = bf.loads(PASSED_FROM_A_COMPARTMENT_EMPTIED_IN_SECONDS)
    single = bf.simulate(s, integrator=RosenbrockIntegrator())
    assert "computed twice" in single.message
    pop = bf.simulate_many([s, s], integrator=RosenbrockIntegrator())
    ref = _converged(s, single)
    for i in range(2):
        assert pop.status[i] == 0, pop.messages[i]
        assert "below the magnitude floor" in pop.messages[i] and "computed again on its own" in pop.messages[i]
        assert np.array_equal(pop.permeated("b1")[i], single.permeated("b1"))
        errors = population_errors(pop, i, ref)
        worst = max(errors, key=errors.get)
        assert errors[worst] <= 1.0, (i, worst, errors[worst])


# Random case 358 of the adversarial sweep (a random network of tests/random_networks.py): a
# compartment of 42 L fed by a 0.15 cm^2 barrier and a transfer from a held compartment holds
# 0.127 mg when a replace at 1.96 h puts 178 g into it. Its scale (4.4 mg/mL) counts the 178 g, so
# before the replace its tolerance on RODAS4 was 2.1e3 times the promise on what the replace took
# out (1e-6 of 1e-4 of the 2.6 g the run held until then), and the default returned removed:c1
# 1.47e-5 mg off, 55 times the contract; floored at the largest amount of the whole run (1.8e5 mg)
# the promise was 1.8e-5 mg and that tolerance 31 times it, which the guard let through.
REPLACE_AFTER_A_SMALL_CONTENT = """
[scenario]
name = "random network (invented)"
duration = "16.974384667516265 h"

[[compartment]]
id = "c0"
volume = "13324.649515940191 mL"
partition = 0.1418934236161053
clearance = "0.023158009652831633 mL/h"

[[compartment]]
id = "c1"
volume = "42179.32341900081 mL"
partition = 1.567425711386735
clearance = "0.04567404599904878 mL/h"

[[barrier]]
id = "b0"
from = "c1"
to = "c0"
area = "0.1479343162743461 cm^2"

[[barrier.layer]]
thickness = "0.0003857822377912438 cm"
diffusivity = "0.0003148905112619481 cm^2/h"
partition = 0.8808082572917416

[[transfer]]
id = "t0"
from = "c1"
to = "c0"
rate = "1.0005343540119827 1/h"

[[dose]]
target = "c0"
kind = "hold"
duration = "3.7580701302970283 h"
concentration = "0.19802535876583804 mg/mL"
every = "3.7580701302970283 h"
count = 3

[[dose]]
target = "c1"
kind = "replace"
concentration = "4.21511805189199 mg/mL"
at = "1.9561377057073035 h"
"""


def test_an_amount_removed_before_a_large_replace_meets_the_contract():
    """What a replace removes is judged on the magnitudes of the run before it (ledger
    ``_removal_promises``), and the run is computed again at tighter tolerances; every exported
    column within the contract of /work/shared/spec/benchmark.md against scipy's Radau IIA (rtol
    1e-10, atol 1e-15; Hairer and Wanner, Solving Ordinary Differential Equations II, 2nd ed.,
    1996, sec. IV.8) on the same grid."""
    s = bf.loads(REPLACE_AFTER_A_SMALL_CONTENT)
    res = bf.simulate(s)
    assert "what events removed from compartment 'c1'" in res.message
    errors = contract_errors(res, _converged(s, res))
    worst = max(errors, key=errors.get)
    assert errors[worst] <= 1.0, (worst, errors[worst], "was 55.4 on removed:c1")
