"""The invented demo scenario: synthetic correlators with a known truth, and a run.

The package: :mod:`~plateaufit.demo.scenario` (the ensemble, its observables and
their truth), :mod:`~plateaufit.demo.simulation` (the noise model, ``simulate``),
:mod:`~plateaufit.demo.files` (the data files, byte for byte from the seed),
:mod:`~plateaufit.demo.spec` (the demo spec, from the package data file
``demo_spec.template``) and :mod:`~plateaufit.demo.run` (``plateaufit demo``).

The ensemble ``heron-a24t48`` is fictional: a 24^3 x 48 lattice (T = 48) with
two independent Monte Carlo streams, ``a`` (600 configurations) and ``b``
(400), every 8th trajectory saved. Four correlators are "measured" on it:

==========  =====================================  ========  ==========  ======
name        operator                               file      boundary    model
==========  =====================================  ========  ==========  ======
pion_ss     pseudoscalar, smeared source and sink  text      periodic    cosh
pion_sl     pseudoscalar, smeared source, local    npy       periodic    cosh
            sink
vector      vector meson, smeared-smeared          hdf5      periodic    cosh
nucleon     positive-parity nucleon                csv       antiperio-  exp
                                                             dic, not
                                                             folded
==========  =====================================  ========  ==========  ======

A third set of observables is a correlator matrix (:mod:`~plateaufit.demo.matrix`):
the axial channel measured with three operators (local ``L``, smeared ``S``,
wide ``W``) as the nine entries ``axial_LL .. axial_WW`` of ``axial.npz``, with
four states, so the three-operator basis cannot resolve the fourth; the demo
fits its three levels from the GEVP at ``t0 = 2``.

Each of the four correlators above is a sum of two states (ground and first excited) with known
energies and amplitudes. The two pion correlators share the states and factorise,
``A_n = Z_n.source * Z_n.sink``, with operators ``S`` (smeared) and ``L``
(local), so a simultaneous or factorised fit is possible.

The nucleon is measured with antiperiodic boundary conditions for the quarks:
in the back half of the lattice the negative-parity partner propagates
backwards, with the opposite sign (sign as for antiperiodic quark boundary
conditions; from memory). Folding would mix it with the positive-parity
forward signal, so the realistic choice is not to fold and to fit the forward
half with the ``exp`` model; the partner's contribution there is below
``1e-8`` of the signal.

The noise model
---------------
Each configuration ``i`` has ``C_i(t) = C(t) (1 + r(t) eta_i(t))`` with
zero-mean unit-variance Gaussian ``eta``, so the ensemble mean is exactly the
truth ``C(t)``:

* Signal-to-noise falls with ``t`` as Parisi argued: the variance
  of a correlator is dominated by the lightest state in its square, of energy
  ``E_noise`` (``2 m_pi`` for mesons, ``3 m_pi`` for the nucleon), so the
  relative noise grows like ``r(t) = r0 exp((E0 - E_noise/2) d(t))`` with
  ``d(t) = min(t, T - t)``. (The pion's signal-to-noise is constant.)
* The noise is correlated across timeslices, smoothly as in real data: in
  ``t``, most of ``eta`` is white noise passed twice through an AR(1) filter,
  with correlation ``(1 + d (1 - a^2)/(1 + a^2)) a^d`` at distance ``d``,
  ``a = exp(-1/xi)``; a small fraction ``rough`` of the variance is
  independent per timeslice, which keeps the smallest eigenvalues of the
  correlation matrix away from zero, as in real data.
* It is autocorrelated in Monte Carlo time: in the configuration index, within
  each stream, an AR(1) chain with coefficient ``phi``, so the integrated
  autocorrelation time is exactly ``tau_int = 1/2 + phi/(1 - phi)`` (the
  1/2 + sum rho convention), different per observable. Each stream starts in
  equilibrium (a stationary draw).
* The smeared-local pion shares most of its noise with the smeared-smeared
  one (same propagators): ``eta_sl = rho eta_ss + sqrt(1 - rho^2) eta'``.

The numbers are written with nine significant digits (``%.8e``), in every
format, so the files are reproduced byte for byte from the seed.

References
----------
G. Parisi, "The strategy for computing the hadronic mass spectrum", Phys. Rept.
103 (1984) 203.
"""

from __future__ import annotations

from plateaufit.demo.files import demo_files, generate_demo_data, hdf5_library_version
from plateaufit.demo.run import format_truth_table, run_demo
from plateaufit.demo.scenario import (DEMO_DERIVED, DEMO_SEED, ENSEMBLE_NAME, OBSERVABLES,
                                      PION_MASS, STREAMS, TIME_EXTENT, DemoObservable,
                                      demo_derived_truth, demo_truth)
from plateaufit.demo.simulation import simulate
from plateaufit.demo.spec import demo_spec_text

__all__ = ["DEMO_DERIVED", "DEMO_SEED", "ENSEMBLE_NAME", "OBSERVABLES", "PION_MASS", "STREAMS",
           "TIME_EXTENT", "DemoObservable", "demo_derived_truth", "demo_truth", "simulate",
           "demo_files", "generate_demo_data", "hdf5_library_version", "demo_spec_text",
           "format_truth_table", "run_demo"]
