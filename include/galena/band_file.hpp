/// Band files: a list of stations (carrier, field strength, modulation, programme, name) and the dial's
/// default sweep, in TOML ([band], optional [dial], [[station]]), for `galena dial`.
#pragma once

#include "galena/dial.hpp"
#include "galena/scenario.hpp"
#include "galena/signal.hpp"
#include "galena/stations.hpp"

#include <cstdint>
#include <filesystem>
#include <memory>
#include <string>
#include <vector>

namespace galena {

/// What a band station broadcasts.
enum class band_programme {
    tone,         ///< a sine of tone_hz
    speech_noise, ///< speech_noise_modulation with the station's seed
    clip,         ///< an audio file (conditioned like signal.audio)
};

struct band_station {
    station_params params;
    band_programme programme = band_programme::speech_noise;
    double tone_hz = 1000.0;             ///< tone programme, Hz; (0, 20000]
    std::filesystem::path audio;         ///< clip programme, absolute (relative paths resolve against the band file)
    std::uint64_t seed = 1;              ///< speech-noise programme
};

/// A band and the dial's default path over it.
struct band_spec {
    std::filesystem::path file;
    std::string title = "band";
    std::vector<band_station> stations;  ///< in file order
    dial_path dial;                      ///< [dial]: from_hz/to_hz/glide_s/law, or stops = "stations" with dwell_s
};

/// Parses a band file. Keys: [band] title; [dial] from_hz, to_hz (default: 5 kHz beyond the outermost
/// carriers), glide_s (10), law ("frequency" | "capacitance"), stops ("" | "stations": dwell on every carrier
/// in frequency order), dwell_s (3); [[station]] name, carrier_hz, field_v_per_m, modulation_index,
/// programme ("tone" | "speech-noise" | "clip"), tone_hz, audio, seed. Numbers take engineering text.
/// Throws config_error "FILE:LINE: field = value: rule".
[[nodiscard]] band_spec parse_band(const std::string& text, const std::filesystem::path& file);
/// Reads (capped, as scenario files) and parses a band file.
[[nodiscard]] band_spec load_band(const std::filesystem::path& file);

/// One programme per station, each lasting `duration_s`; clips are conditioned with the scenario's
/// signal.audio_cutoff_hz (and end early if shorter). Throws audio_error, config_error.
[[nodiscard]] std::vector<std::unique_ptr<modulation>> make_band_programmes(const band_spec& band, const scenario& base,
                                                                            double duration_s);

} // namespace galena
