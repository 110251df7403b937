/// The earpiece as a transducer: the diaphragm drive force of each earpiece model, from its terminal voltage.
///
/// What the ear hears follows the diaphragm, not the earpiece voltage. This module turns the earpiece's
/// terminal voltage into the force that drives its diaphragm, so that earpieces of different kinds can be
/// compared on one quantity (newtons):
/// - piezo without a motional branch: F = N v (the static limit of the Butterworth-Van Dyke model);
/// - piezo with a Butterworth-Van Dyke branch (Rm, Lm, Cm across C0): the branch is the diaphragm seen
///   through the transduction ratio N, its charge q_m is N x displacement, and F = N q_m / Cm is the force in
///   the diaphragm's spring (equal to N v well below the resonance; BVD equivalent circuit, IEEE Std 176);
/// - magnetic phones (R in series with L || R_loss): F = Bl i_L, with i_L the current through the winding's
///   inductance (the flux-producing part; R_loss stands for the iron's eddy losses), Bl the force factor.
/// The diaphragm's own area and stiffness are not modelled: equal drive force means equal loudness only for
/// alike diaphragms. Not for the resistor load (no transducer). The waveform (diaphragm_drive_n) is in
/// characterize.hpp: it filters through the FFT, which lives in the metrics layer.
#pragma once

#include "galena/components.hpp"

#include <complex>
#include <string_view>

namespace galena {

/// True when `e` has a diaphragm drive (piezo or magnetic; not the resistor).
[[nodiscard]] bool has_diaphragm_drive(const earpiece_params& e) noexcept;

/// One line naming the quantity the drive is computed from for this earpiece, e.g. "force N q_m / C_m from
/// the motional (BVD) branch's charge"; "" for the resistor.
[[nodiscard]] std::string_view diaphragm_drive_quantity(const earpiece_params& e) noexcept;

/// The drive force per volt of terminal voltage at `frequency_hz` (>= 0), N/V, as a complex ratio:
/// piezo N; BVD N / (1 - w^2 Lm Cm + j w Rm Cm); magnetic Bl R_loss / (R R_loss + j w L (R + R_loss)).
/// 0 for the resistor. `e` must be valid.
[[nodiscard]] std::complex<double> diaphragm_drive_per_volt(const earpiece_params& e, double frequency_hz);

} // namespace galena
