/// Several stations summed at the antenna: each a carrier with a complex envelope, EMF = Re(E(t) e^{j w t}).
/// An AM station (am_source) has a real envelope; background noise (band_noise) has a complex one,
/// I(t) + j Q(t). The integrators sample it; none of the carriers need lie on their grid.
#pragma once

#include "galena/signal.hpp"

#include <complex>
#include <cstdint>
#include <memory>
#include <string>
#include <utility>
#include <variant>
#include <vector>

namespace galena {

/// One station as the scenario gives it.
struct station_params {
    std::string name = "station";  ///< label for reports
    double carrier_hz = 1.0e6;     ///< Hz; [1e4, 1e8]
    double field_v_per_m = 10e-3;  ///< RMS field strength of the unmodulated carrier at the antenna, V/m; (0, 100]
    double modulation_index = 0.3; ///< m; [0, 1]
    const station_params& validate() const;
};

/// Settings of the background noise at the antenna (off unless `field_density` > 0).
struct antenna_noise_params {
    /// One-sided RMS field-strength spectral density at the antenna, V/m per sqrt(Hz); 0 = no noise; [0, 1e-3].
    /// The RMS field in a bandwidth b is field_density x sqrt(b) (the bookkeeping of ITU-R P.372's E_n).
    double field_density = 0.0;
    /// The noise occupies the wanted carrier +- this, Hz; [1e3, 0.45 x the carrier]. See band_noise.
    double half_band_hz = 40e3;
    std::uint64_t seed = 1; ///< the noise's seed: the same seed gives the same noise, sample for sample
    const antenna_noise_params& validate() const;
};

/// A quiet rural evening at medium frequencies, V/m per sqrt(Hz): ITU-R P.372's "quiet rural" man-made
/// noise, Fa = 53.6 - 28.6 log10(f / 1 MHz) dB above kT0b (values from memory, not checked against the
/// current edition), at 1 MHz: E_n = Fa + 20 log10(f / 1 MHz) + 10 log10(b / 1 Hz) - 95.5 dB(uV/m) (P.372's
/// conversion for a short vertical monopole over perfect ground, from memory) = -41.9 dB(uV/m) in 1 Hz,
/// 8.04e-9 V/m per sqrt(Hz). Evening atmospheric noise at MF can be far higher (tens of dB): this is the
/// quiet floor.
[[nodiscard]] double quiet_rural_noise_field_density() noexcept;

/// Band-limited Gaussian noise as a complex envelope I(t) + j Q(t) around a carrier: EMF =
/// Re((I + jQ) e^{j w t}) = I cos(w t) - Q sin(w t). I and Q are independent, each white Gaussian samples
/// at a rate r (seeded counter-based generator: sample n of the I or Q channel depends only on the seed and
/// n) interpolated by a Kaiser-windowed sinc k (32 samples each side, beta = 8) of unit DC gain. So each has
/// the two-sided density D^2 in the pass band (D the one-sided EMF density), and r is set so that the
/// noise-equivalent width r int k^2 is B = 2 x half_band: the EMF has the one-sided density D^2 over
/// carrier +- B/2 and variance D^2 B (the windowed sinc's transition straddles the band edge r/2, a little
/// above B/2). The interpolator is summed exactly on a grid 8 times finer than the samples, and a 6-point
/// Lagrange quintic runs between its points (within 1e-5 of the RMS of the exact sum: band_noise_test).
/// Outside the band there is no noise: a single tuned circuit of -3 dB bandwidth b would pass a further
/// fraction (2/pi) atan(b / B) of a flat density from outside (at b = 10 kHz, B = 80 kHz: 7.9 %, -0.36 dB
/// of RF noise power), but that part beats with the carrier above the audio band.
class band_noise {
public:
    /// @param density_v_per_rthz one-sided EMF density D, V/sqrt(Hz) (>= 0); @param half_band_hz B/2, Hz (> 0).
    band_noise(double density_v_per_rthz, double half_band_hz, std::uint64_t seed);
    /// The complex envelope I + jQ at time t_s, V.
    [[nodiscard]] std::complex<double> envelope(double t_s) const noexcept;
    /// Sample n (n >= 0 or < 0) of channel 0 (I) or 1 (Q): a standard normal deviate.
    [[nodiscard]] static double gaussian(std::uint64_t seed, long long n, int channel) noexcept;
    [[nodiscard]] double density_v_per_rthz() const noexcept { return m_density; }
    [[nodiscard]] double half_band_hz() const noexcept { return m_half_band; }
    /// The rate r of the white samples, Hz (r int k^2 = 2 x half_band).
    [[nodiscard]] double sample_rate_hz() const noexcept { return m_rate; }

private:
    double m_density, m_half_band, m_rate, m_scale;
    std::uint64_t m_seed;
    // The samples around the last evaluation: index m_first .. m_first + size - 1, I and Q.
    mutable std::vector<double> m_raw_i, m_raw_q;
    mutable long long m_first = 0;
    // The interpolator's output on the fine grid (see stations.cpp), points m_fine_first .. + size / 2 - 1.
    mutable std::vector<double> m_fine;
    mutable long long m_fine_first = 0;
    void fill_fine(long long first) const;
};

/// The antenna EMF: the sum of the stations' waves. Holds the sources by value (each am_source points at
/// its programme, which must outlive this object).
class station_source {
public:
    /// Adds a station; `emf` is its AM wave at the antenna's EMF (carrier peak = sqrt(2) x field x height).
    void add(std::string name, const am_source& emf) { m_names.push_back(std::move(name)), m_sources.emplace_back(emf); }
    /// Adds a station with a complex envelope (background noise) around `carrier_hz`.
    void add(std::string name, double carrier_hz, const band_noise& noise)
    {
        m_names.push_back(std::move(name)), m_sources.emplace_back(noise_station{carrier_hz, noise});
    }
    [[nodiscard]] std::size_t size() const noexcept { return m_sources.size(); }
    /// Whether station k is an AM station (else a complex-envelope one).
    [[nodiscard]] bool is_am(std::size_t k) const { return std::holds_alternative<am_source>(m_sources.at(k)); }
    /// Station k's AM source; throws std::bad_variant_access for a complex-envelope station.
    [[nodiscard]] const am_source& station(std::size_t k) const { return std::get<am_source>(m_sources.at(k)); }
    [[nodiscard]] const std::string& name(std::size_t k) const { return m_names.at(k); }
    /// Station k's carrier, Hz.
    [[nodiscard]] double carrier_hz(std::size_t k) const noexcept;
    /// Station k's complex envelope at t_s (real for AM): its EMF is Re(E e^{j 2 pi f t}), V.
    [[nodiscard]] std::complex<double> envelope(std::size_t k, double t_s) const noexcept;
    /// The summed EMF at simulation time t_s, V.
    [[nodiscard]] double voltage(double t_s) const noexcept;

private:
    struct noise_station {
        double carrier_hz;
        band_noise noise;
    };
    std::vector<std::string> m_names;
    std::vector<std::variant<am_source, noise_station>> m_sources;
};

} // namespace galena
