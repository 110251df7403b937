/// Pack files (TOML: a [pack] section and [[variant]] tables) read into a pack_spec, their variants loaded as
/// a sweep would, and the bundled demo data found. Built on sweeps (variant_spec); sweeps know nothing of packs.
#pragma once

#include "galena/scenario.hpp"
#include "galena/sweep.hpp"

#include <filesystem>
#include <optional>
#include <string>
#include <vector>

namespace galena {

/// A comparison pack described in a file (TOML; README "Pack files"):
/// ```toml
/// [pack]
/// title = "..."                # page title
/// scenario = "base.toml"       # base scenario, relative to this file
/// measure_tone_hz = 1000       # optional (default 1 kHz; 0 = off): for clip programmes, also measure each
///                              # variant with this tone
/// measure_duration_s = 0.3     # length of that tone render, s
/// [[variant]]
/// name = "ge-weak-47k"
/// label = "germanium, weak carrier, 47k bleeder"
/// set = ["load.bleeder_ohm=47k", "signal.carrier_peak_v=100m"]
/// ```
/// A band sweep in a pack (`[[dial_sweep]]`: name, label, band, set, from_hz, to_hz, glide_s): the pack's
/// scenario with `overrides`, turned across the band file's stations (galena dial), rendered after the variants.
struct pack_dial_sweep {
    std::string name;
    std::string label;
    std::filesystem::path band;          ///< the band file, resolved against the pack file
    std::vector<std::string> overrides;  ///< on the pack's scenario
    std::optional<double> start_hz;      ///< replaces the band's [dial] from_hz, Hz
    std::optional<double> end_hz;        ///< replaces the band's [dial] to_hz, Hz
    std::optional<double> glide_s;       ///< replaces the band's [dial] glide_s, s
};

struct pack_spec {
    std::filesystem::path file;
    std::string title;
    std::filesystem::path scenario;  ///< resolved
    double measure_tone_hz = default_measure_tone_hz;       ///< Hz; 0 = measure the programme itself
    double measure_duration_s = default_measure_duration_s; ///< s; (0, 10]
    std::vector<variant_spec> variants;
    std::vector<pack_dial_sweep> dial_sweeps; ///< [[dial_sweep]] tables, in file order
};

/// True when `file` is TOML holding a [pack] section or [[variant]] tables (a pack file rather than a
/// scenario); false for anything else, unreadable or malformed files included (their loader reports).
[[nodiscard]] bool is_pack_file(const std::filesystem::path& file);

/// Loads the pack's base scenario with `base_overrides` and each variant's overrides, as a sweep would
/// before rendering, and returns the scenarios in variant order (for `galena check`). Throws config_error
/// naming the variant, the file and line or the override, the field and the rule.
[[nodiscard]] std::vector<scenario> load_pack_variants(const pack_spec& pack, const std::vector<std::string>& base_overrides = {});

/// Reads a pack file. Throws config_error "FILE:LINE: field: rule" (unknown sections and keys, wrong
/// types and out-of-range values included).
[[nodiscard]] pack_spec load_pack(const std::filesystem::path& file);
/// Parses pack text (file is used in messages and to resolve the scenario path). Throws as load_pack.
[[nodiscard]] pack_spec parse_pack(const std::string& text, const std::filesystem::path& file);

/// Finds a bundled file (e.g. "scenarios/demo-pack.toml") for the demo: under $GALENA_DATA_DIR, then in
/// the folders above `executable` (a build tree inside the source tree), then above the current
/// directory, then in `installed_data_dir`. Throws config_error listing the places searched.
[[nodiscard]] std::filesystem::path find_bundled_file(const std::filesystem::path& relative, const std::filesystem::path& executable,
                                                      const std::filesystem::path& installed_data_dir = {});

} // namespace galena
