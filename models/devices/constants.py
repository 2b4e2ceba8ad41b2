"""Physical constants, each defined once with its source. All SI."""

# SI Brochure, 9th ed. (BIPM 2019): the 2019 redefinition fixes these two exactly.
BOLTZMANN = 1.380649e-23  # J/K, k, exact (SI 2019)
ELEMENTARY_CHARGE = 1.602176634e-19  # C, q, exact (SI 2019)

ZERO_CELSIUS = 273.15  # K, definition of the Celsius scale (SI 2019)
T_NOMINAL = 300.15  # K, 27 degC: the SPICE default TNOM (ngspice manual, .options TNOM)


def thermal_voltage(temp):
    """Thermal voltage UT = kT/q.

    Parameters
    ----------
    temp : float or ndarray
        Absolute temperature [K], any shape.

    Returns
    -------
    float or ndarray
        UT [V], same shape. 25.852 mV at 300 K.
    """
    return BOLTZMANN * temp / ELEMENTARY_CHARGE
