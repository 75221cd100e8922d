"""Sources that change in time: the survey's epochs (``cadence``), type Ia supernovae
(``supernova``) and quasars that vary as a damped random walk (``variability``).

Each light-curve object answers ``magnitudes(times) -> {band: AB magnitudes}`` for the unlensed
source at observer-frame times (MJD); the images of a lensed source see it at their own delays
(:mod:`simlens.imaging.epochs`)."""
