r"""Energy balance of the vessel, the jacket's response, and the DCS's reactor-temperature loop.

The contents (heat capacity :math:`m c_p`) exchange heat with the jacket through :math:`UA`; the
jacket follows its setpoint through a first-order lag with a rate limit, as the DCS's jacket
loop (cascade slave) would; crystallization may release heat :math:`\dot Q` [W]:

.. math::
    m c_p \frac{dT}{dt} &= UA\,(T_j - T) + \dot Q \\
    \frac{dT_j}{dt} &= \operatorname{clip}\left(\frac{T_j^{sp} - T_j}{\tau_j},
        -r_{max}, r_{max}\right)

The master loop (:class:`ReactorTemperatureController`) is a PI controller on the measured
reactor temperature whose output is the jacket setpoint, with the reactor setpoint as bias and
an optional feed-forward of its rate, :math:`T_j^{sp} = T^{sp} + (m c_p/UA)\,\dot T^{sp} + K_c
(e + \frac{1}{T_i}\int e\,dt)`: without it, a ramp would lag by :math:`\dot T^{sp} T_i/K_c`.
The integral stops while the output is held at a jacket limit (anti-windup).

References
----------
.. [1] D. E. Seborg, T. F. Edgar, D. A. Mellichamp, F. J. Doyle III, *Process Dynamics and
   Control*, 4th ed., Wiley, 2016, ch. 4-5 (first-order response), ch. 8 (PI control, reset
   windup) and ch. 16 (cascade and feed-forward control).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class ThermalModel:
    """The two-temperature model of the module.

    Parameters
    ----------
    heat_transfer_w_per_k : :math:`UA` [W/K]
    heat_capacity_j_per_k : :math:`m c_p` of the contents [J/K]
    jacket_time_constant_s : :math:`\\tau_j` [s]
    jacket_max_rate_k_per_s : :math:`r_{max}` [K/s]
    """

    heat_transfer_w_per_k: float
    heat_capacity_j_per_k: float
    jacket_time_constant_s: float
    jacket_max_rate_k_per_s: float

    def __post_init__(self) -> None:
        for name in (
            "heat_transfer_w_per_k",
            "heat_capacity_j_per_k",
            "jacket_time_constant_s",
            "jacket_max_rate_k_per_s",
        ):
            if not getattr(self, name) > 0.0:
                raise ValueError(f"{name} must be positive")

    @property
    def reactor_time_constant_s(self) -> float:
        """:math:`m c_p / UA` [s]: how fast the contents follow the jacket."""
        return self.heat_capacity_j_per_k / self.heat_transfer_w_per_k

    def derivatives(
        self, temp: float, jacket: float, jacket_setpoint: float, heat_w: float
    ) -> tuple[float, float]:
        """:math:`(dT/dt, dT_j/dt)` [K/s] at reactor ``temp``, ``jacket`` [K], the jacket
        setpoint [K] and the heat released in the contents ``heat_w`` [W]."""
        reactor = (
            self.heat_transfer_w_per_k * (jacket - temp) + heat_w
        ) / self.heat_capacity_j_per_k
        pull = (jacket_setpoint - jacket) / self.jacket_time_constant_s
        limit = self.jacket_max_rate_k_per_s
        return reactor, min(max(pull, -limit), limit)

    def step(
        self, temp: float, jacket: float, jacket_setpoint: float, heat_w: float, dt_s: float
    ) -> tuple[float, float]:
        """Advance both temperatures [K] by ``dt_s`` [s] (classical Runge-Kutta, fourth order),
        the setpoint and the heat held over the step."""
        k1t, k1j = self.derivatives(temp, jacket, jacket_setpoint, heat_w)
        h = 0.5 * dt_s
        k2t, k2j = self.derivatives(temp + h * k1t, jacket + h * k1j, jacket_setpoint, heat_w)
        k3t, k3j = self.derivatives(temp + h * k2t, jacket + h * k2j, jacket_setpoint, heat_w)
        k4t, k4j = self.derivatives(temp + dt_s * k3t, jacket + dt_s * k3j, jacket_setpoint, heat_w)
        sixth = dt_s / 6.0
        return (
            temp + sixth * (k1t + 2.0 * k2t + 2.0 * k3t + k4t),
            jacket + sixth * (k1j + 2.0 * k2j + 2.0 * k3j + k4j),
        )


class ReactorTemperatureController:
    """The DCS's reactor temperature master loop (PI, module equation), output: the jacket
    setpoint.

    Parameters
    ----------
    gain : :math:`K_c` [K/K]
    integral_time_s : :math:`T_i` [s]
    output_range_k : jacket setpoint limits [K]
    feedforward_time_s : :math:`m c_p / UA` [s] for the rate feed-forward; 0 turns it off
    """

    def __init__(
        self,
        gain: float,
        integral_time_s: float,
        output_range_k: tuple[float, float],
        feedforward_time_s: float,
    ) -> None:
        if not (gain > 0.0 and integral_time_s > 0.0 and feedforward_time_s >= 0.0):
            raise ValueError("PI gain and integral time must be positive")
        if not output_range_k[0] < output_range_k[1]:
            raise ValueError("jacket setpoint range must be ascending")
        self.gain = gain
        self.integral_time_s = integral_time_s
        self.output_range_k = output_range_k
        self.feedforward_time_s = feedforward_time_s
        self.integral_k_s = 0.0

    def update(
        self, setpoint: float, setpoint_rate: float, measured: float | None, dt_s: float
    ) -> float | None:
        """The jacket setpoint [K] for the next interval, from the reactor setpoint [K], its
        rate [K/s] and the measured reactor temperature [K]; ``None`` (hold the last output)
        when there is no usable measurement, as a DCS loop does on a bad PV."""
        if measured is None:
            return None
        error = setpoint - measured
        base = setpoint + self.feedforward_time_s * setpoint_rate
        trial = base + self.gain * (
            error + (self.integral_k_s + error * dt_s) / self.integral_time_s
        )
        low, high = self.output_range_k
        if low < trial < high or (trial >= high and error < 0.0) or (trial <= low and error > 0.0):
            self.integral_k_s += error * dt_s
        output = base + self.gain * (error + self.integral_k_s / self.integral_time_s)
        return min(max(output, low), high)
