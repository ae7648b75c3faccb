"""Plain yardstick of `mfma analyze sader`: k = 0.1906 rho b^2 L Q Gamma_i omega^2 (Sader, Chon & Mulvaney 1999,
Rev. Sci. Instrum. 70, 3967) with Gamma_rect = Omega Gamma_circ (Sader 1998, J. Appl. Phys. 84, 64) from the
modified Bessel functions of scipy.special; air at 20 degC and 1 atm (handbook values)."""
import json
import sys

import numpy as np
import scipy.special

length, width, f0, q = (float(v) for v in sys.argv[1:5])
length, width = length * 1e-6, width * 1e-6
rho, eta = 1.204, 1.81e-5
w = 2 * np.pi * f0
re = rho * w * width**2 / (4 * eta)
s = np.sqrt(1j * re)
circ = 1 + 4j * scipy.special.kve(1, -1j * s) / (s * scipy.special.kve(0, -1j * s))
tau = np.log10(re)
om_r = np.polyval([0.00069085, -0.0035117, 0.044055, -0.12886, 0.46842, -0.48274, 0.91324], tau) / np.polyval(
    [0.00069085, -0.0035862, 0.045155, -0.13444, 0.48690, -0.56964, 1.0], tau)
om_i = np.polyval([-0.000044510, 0.000064577, -0.00010961, 0.016294, -0.029256, -0.024134], tau) / np.polyval(
    [0.0028361, -0.014369, 0.079156, -0.18357, 0.55182, -0.59702, 1.0], tau)
gamma = (om_r + 1j * om_i) * circ
print(json.dumps({"k_n_per_m": 0.1906 * rho * width**2 * length * q * gamma.imag * w**2, "reynolds": re}))
