"""Line fitting of single spectra: per-angle peak tables of maps and observables of power series.

Two entry points turn canonical data into numbers with errors:

* :func:`peak_table` fits 1 to 3 lines per angle (or k) column of a map and follows each
  polariton branch from angle to angle.  The result seeds a dispersion fit.
* :func:`extract_observables` reduces a spectra cube of a power series to the integrated
  intensity, peak energy and linewidth of its main line per spectrum, at k = 0 by default.

Their figures are drawn by :mod:`polkit.plotting.linefit`.  The parts: :mod:`.inputs` (checks
of the data and options), :mod:`.noise` (noise model), :mod:`.spectrum` (the fit of one
spectrum), :mod:`.detection` (candidate lines, seeds, dropping weak lines), :mod:`.peaks` and
:mod:`.observables` (the two entry points).

Every spectrum is fitted by :func:`scipy.optimize.least_squares` with a constant background
plus Lorentzian or Voigt lines (:mod:`polkit.models.lineshapes`).  Internally energies are in
meV from a reference energy, which keeps the problem well scaled.

Noise model.  When the data are in raw counts and carry ``gain`` (electrons per count) and
optionally ``read_noise`` (counts) in their attrs (a Jacobian-scaled map, ``counts nm/eV``, is
treated as without them: its noise is learnt), the variance of a pixel is
``counts / gain + read_noise**2`` (CCD counting statistics), evaluated first on a smoothed copy
of the data and then on the fitted model (one reweighting step); the reported errors come from
the weighted Jacobian without rescaling and ``reduced_chi2`` tells how well the model and the
noise model agree.  Without ``gain`` (and always for reflectance, a ratio) the noise is learnt
from the data: a first fit with equal weights, then a pixel variance ``a + b * level`` fitted
to the squared residuals by non-negative least squares (shot noise makes bright pixels scatter
more), a reweighted fit, and the covariance from the Jacobian scaled by the residual variance.

Detection.  A line counts as found when its signal-to-noise ratio ``snr`` reaches ``min_snr``.
The test pools the pixels a line covers: ``snr`` is the fitted peak height (or dip depth) over
the noise standard deviation of the mean of the pixels within one FWHM of the centre, i.e. the
height over the single-pixel noise at the centre times ``sqrt(n)``, ``n = FWHM / pixel step``
clipped to 1..9 (averaging n pixels divides the noise by sqrt(n); the cap keeps broad background
bumps from passing as lines), and at most the height over its own standard error from the fit
(which counts the freedom of the centre, width and background).  A faint line spread
over many pixels (a few counts per pixel) is thus found, where a single-pixel test would refuse
it.  Candidate maxima are found on a copy smoothed by a Gaussian of 1.5 pixels, judged against
the noise of that smoothed copy.  Fits that fail the test are repeated without the weakest line,
so the reported lines are never distorted by a spurious one.
# common practice, no published source
"""

from polkit.linefit.observables import extract_observables
from polkit.linefit.peaks import peak_table

__all__ = ["peak_table", "extract_observables"]
