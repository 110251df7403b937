/// Scenario files (TOML): the user-facing contract that describes one variant — signal, source, diode,
/// output network, earpiece, output format and solver accuracy — plus command-line overrides.
/// All values are SI; `inf` (bare or quoted) means "absent" for resistances.
#pragma once

#include "galena/audio_io.hpp"
#include "galena/circuit.hpp"
#include "galena/front_end.hpp"
#include "galena/render.hpp"
#include "galena/signal.hpp"
#include "galena/units.hpp"
#include "galena/stations.hpp"

#include <filesystem>
#include <memory>
#include <string>
#include <string_view>
#include <vector>

namespace galena {

/// What modulates the carrier.
enum class programme_kind {
    clip,      ///< an audio file
    tone,      ///< one sine
    two_tone,  ///< two sines at a stated amplitude ratio (IMD)
    log_sweep, ///< exponential sine sweep
};

/// The programme part of a scenario.
struct programme_spec {
    programme_kind kind = programme_kind::tone;
    std::filesystem::path audio;     ///< clip path, resolved relative to the scenario file
    double tone_hz = 1000.0;         ///< Hz
    double tone2_hz = 0.0;           ///< second tone, Hz (two-tone)
    double tone_ratio = 4.0;         ///< amplitude ratio tone : tone2 (two-tone)
    double sweep_start_hz = 50.0;    ///< Hz
    double sweep_stop_hz = 5000.0;   ///< Hz
    /// Test-signal length, s (default 0.5); for a clip a limit on its length, 0 = the whole clip (the
    /// default for a clip: parse_scenario sets 0 when a clip is given without signal.duration_s).
    double duration_s = 0.5;
    double audio_cutoff_hz = 5000.0; ///< band limit of clip audio, Hz
};

/// Output file settings.
struct output_spec {
    wav_format format = wav_format::pcm24;
    /// Earpiece volts that map to digital full scale; the same for every variant so that files keep their
    /// relative loudness. 0 = automatic ("auto" in a file, the default): the command chooses it from the
    /// loudest peak of all its renders (choose_full_scale_v, job.hpp), the same for every variant.
    double full_scale_v = 0.0;
};

/// One [[station]] of a receiver scenario: its parameters and its programme (a tone or a clip).
struct station_spec {
    station_params params;
    programme_kind kind = programme_kind::tone; ///< tone or clip
    std::filesystem::path audio;                ///< clip path, resolved relative to the scenario file
    double tone_hz = 1000.0;                    ///< Hz
};

/// A complete, validated scenario.
struct scenario {
    std::filesystem::path file;      ///< where it came from (empty for built-in)
    std::filesystem::path diode_file; ///< diode.file: the diode file the diode came from (absolute), or empty
    programme_spec programme;
    am_params am;
    circuit_params circuit;
    render_settings render;
    output_spec output;
    /// The front end: tuner.layout = bench (the default) renders [signal] through [source]; the other layouts
    /// render the [[station]]s through [antenna] and [tuner].
    antenna_params antenna;
    tuner_params tuner;
    std::vector<station_spec> stations;  ///< the first is the wanted station
    antenna_noise_params noise;          ///< background noise at the antenna ([antenna] noise_*; off by default)
};

/// Parses and validates a scenario file, then applies `overrides` ("section.key=value", TOML value syntax;
/// bare words are taken as strings). One station of the [[station]] list is addressed as
/// "station.N.key=value", N from 1 (the wanted station) in file order ("station.2.carrier_hz=1.01MHz");
/// "station.key=value" without N is refused when the file has a [[station]] list (it makes a [station]
/// table where there is none). Numeric keys take numbers or engineering text with the key's unit
/// (parse_quantity: "47k", "10nF"). Throws config_error "FILE:LINE: section.key = value: rule" on any
/// problem, with a suggestion for unknown keys, for a key given without its section, and for a value that
/// a missing SI prefix or a percentage made invalid ("did you mean 1000e3 or 1000k?"). An audio file given
/// as the scenario is refused with the way to use it as the clip.
[[nodiscard]] scenario load_scenario(const std::filesystem::path& file, const std::vector<std::string>& overrides = {});
/// Parses scenario text (file is used only in messages and to resolve relative paths).
[[nodiscard]] scenario parse_scenario(const std::string& text, const std::filesystem::path& file,
                                      const std::vector<std::string>& overrides = {});

/// One key of the scenario contract, from the key table that reads and writes it.
struct scenario_key {
    std::string field;     ///< "section.key"
    unit u = unit::none;   ///< the unit a value may carry (numeric keys)
    bool numeric = false;  ///< takes a number (or engineering text); otherwise a string or true/false
};
/// Every key of the contract, sorted by field.
[[nodiscard]] const std::vector<scenario_key>& scenario_keys();
/// The key-table field that an override's field addresses: "station.N.key" (station N of the [[station]]
/// list, N from 1 = the wanted station) -> "station.key"; any other field unchanged.
[[nodiscard]] std::string contract_field(std::string_view field);
/// The unit of the numeric key `field` ("load.bleeder_ohm" -> unit::ohm). Throws config_error for an
/// unknown key (naming the nearest) or a key that is not numeric.
[[nodiscard]] unit key_unit(std::string_view field);
/// The valid fields nearest to `text`, given with or without its section ("bleeder_ohm" ->
/// {"load.bleeder_ohm"}; "resistance_ohm" -> both sections that have it); empty when none is close.
[[nodiscard]] std::vector<std::string> suggest_fields(std::string_view text);

/// Throws config_error when `text` (the contents of `file`) is not TOML but an audio file that libsndfile
/// opens, saying so and how to use it as a scenario's clip; `expected` names the file kind ("scenario",
/// "pack"). Returns quietly otherwise (the caller's parser reports any other problem).
void refuse_audio_file(const std::filesystem::path& file, const std::string& text, std::string_view expected);

/// Builds the modulation the scenario describes (opens the audio file for clips). Errors about the clip
/// (audio_error, config_error) name the clip's file.
[[nodiscard]] std::unique_ptr<modulation> make_programme(const scenario& s);

/// The programme of each station of a receiver scenario, in scenario order (tones last signal.duration_s;
/// clips are conditioned with signal.audio_cutoff_hz and limited by signal.duration_s when > 0).
[[nodiscard]] std::vector<std::unique_ptr<modulation>> make_station_programmes(const scenario& s);

/// Programme length, s, without conditioning the clip: a clip's header gives frames / rate (limited by
/// signal.duration_s when that is > 0); a test signal lasts signal.duration_s. Throws audio_error for a
/// clip that cannot be opened.
[[nodiscard]] double programme_duration_s(const scenario& s);

/// The scenario as TOML text, every key explicit (round-trips through parse_scenario).
[[nodiscard]] std::string to_toml(const scenario& s);

} // namespace galena
