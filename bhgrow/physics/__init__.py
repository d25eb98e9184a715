"""Physical prescriptions of bhgrow, one module per process.

Each process is a small frozen dataclass with validated parameters and one vectorized method
on float64 arrays in the internal unit system of :mod:`bhgrow.constants` (Msun, kpc, km/s,
Gyr). Plain functions beside each class expose the underlying formulas for reuse.

Modules
-------
halo
    Virial overdensity, radius, circular velocity and temperature; NFW concentration,
    maximum circular velocity and central escape speed.
gas
    One-zone gas reservoir: inflow, star formation, supernova outflow, metals.
seeding
    Black-hole seeding channels.
accretion
    Bondi-Hoyle-Lyttleton accretion with an Eddington cap.
feedback
    Coupling of AGN luminosity to the gas reservoir.
dynamics
    Merger delays: dynamical friction, binary hardening, gravitational-wave inspiral.
remnants
    Remnant mass, spin and recoil of black-hole coalescences.
"""
