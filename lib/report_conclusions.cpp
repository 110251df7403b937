#include "galena/report_conclusions.hpp"

#include "galena/audio_io.hpp"
#include "galena/metrics.hpp"
#include "galena/units.hpp"

#include <algorithm>
#include <cctype>
#include <cmath>
#include <fmt/format.h>
#include <functional>
#include <numeric>

namespace galena {

namespace {

constexpr double empty_band_db = -200.0;
constexpr double share_floor_db = -100.0;
constexpr double bright_from_hz = 2000.0;  ///< brightness: the bands centred here and above (nominal 2 kHz)
constexpr double max_band_hz = 10e3;       ///< the bands stop below this (the speech and music brightness range)
constexpr std::size_t max_segment = 8192;

/// Centre of the i-th band counted from 100 Hz (k = i - 10 in f = 1000 * 10^(k/10)).
double band_centre_hz(std::size_t i) { return 1000.0 * std::pow(10.0, (static_cast<double>(i) - 10.0) / 10.0); }

double power_sum_db(std::span<const double> db)
{
    double p = 0.0;
    for (double d : db) p += std::pow(10.0, d / 10.0);
    return p > 0.0 ? 10.0 * std::log10(p) : empty_band_db;
}

std::string join_names(const std::vector<std::string>& names)
{
    std::string s;
    for (std::size_t i = 0; i < names.size(); ++i) {
        if (i > 0) s += (i + 1 == names.size()) ? " and " : ", ";
        s += names[i];
    }
    return s;
}

/// "9.0 dB quieter than R and brighter", "as loud as R (within 1 dB) but duller", ...
std::string describe(const pair_verdict& v, const std::string& ref, const listening_thresholds& t)
{
    std::string level = v.same_level ? fmt::format("as loud as {} (within {:g} dB)", ref, t.same_level_db)
                                     : fmt::format("{:.1f} dB {} than {}", std::abs(v.level_db), v.level_db < 0.0 ? "quieter" : "louder", ref);
    std::string colour;
    if (v.same_spectrum)
        colour = v.same_level ? "" : ", with the same tone colour";
    else if (v.brightness_db >= t.brightness_db)
        colour = v.same_level ? " but brighter" : " and brighter";
    else if (v.brightness_db <= -t.brightness_db)
        colour = v.same_level ? " but duller" : " and duller";
    else
        colour = std::isfinite(v.spectral_db) ? (v.same_level ? " but different in tone colour" : " and different in tone colour") : "";
    return level + colour;
}

} // namespace

std::vector<double> third_octave_centres_hz(double max_hz)
{
    std::vector<double> c;
    for (std::size_t i = 0;; ++i) {
        const double f = band_centre_hz(i);
        if (f * std::pow(10.0, 1.0 / 20.0) >= max_hz) break;
        c.push_back(f);
    }
    return c;
}

std::vector<double> band_levels_db(std::span<const float> samples, double fs_hz)
{
    if (samples.size() < 256 || !(fs_hz > 0.0)) return {};
    const std::vector<double> centres = third_octave_centres_hz(std::min(fs_hz / 2.0, max_band_hz));
    std::size_t n = 256;
    while (n * 2 <= std::min(max_segment, samples.size())) n *= 2;
    const std::vector<double> w = make_window(spectrum_window::hann, n);
    const double s1 = std::accumulate(w.begin(), w.end(), 0.0);
    const double s2 = std::inner_product(w.begin(), w.end(), w.begin(), 0.0);
    const double enbw_bins = static_cast<double>(n) * s2 / (s1 * s1);
    std::vector<double> power(centres.size(), 0.0);
    std::vector<double> seg(n);
    std::size_t segments = 0;
    for (std::size_t at = 0; at + n <= samples.size(); at += n / 2, ++segments) {
        double mean = 0.0;
        for (std::size_t k = 0; k < n; ++k) mean += samples[at + k];
        mean /= static_cast<double>(n);
        for (std::size_t k = 0; k < n; ++k) seg[k] = samples[at + k] - mean;
        const amplitude_spectrum sp = compute_spectrum(seg, fs_hz, spectrum_window::hann);
        // A bin's share of the mean square: A^2 / 2 over the window's equivalent noise bandwidth in bins.
        for (std::size_t k = 1; k < n / 2; ++k) {
            const double f = sp.frequency_hz[k];
            for (std::size_t b = 0; b < centres.size(); ++b)
                if (f >= centres[b] * std::pow(10.0, -1.0 / 20.0) && f < centres[b] * std::pow(10.0, 1.0 / 20.0)) {
                    power[b] += sp.amplitude_v[k] * sp.amplitude_v[k] / 2.0 / enbw_bins;
                    break;
                }
        }
    }
    std::vector<double> db(centres.size());
    for (std::size_t b = 0; b < centres.size(); ++b) {
        const double p = power[b] / static_cast<double>(segments);
        db[b] = p > 0.0 ? std::max(empty_band_db, 10.0 * std::log10(p)) : empty_band_db;
    }
    return db;
}

double spectral_distance_db(const listening_measure& a, const listening_measure& b, const listening_thresholds& t)
{
    const std::size_t n = std::min(a.band_db.size(), b.band_db.size());
    if (n == 0) return std::numeric_limits<double>::quiet_NaN();
    // Levels taken out: each spectrum relative to its own total in these bands.
    const double la = power_sum_db(std::span(a.band_db).first(n)), lb = power_sum_db(std::span(b.band_db).first(n));
    double top = empty_band_db;
    for (std::size_t i = 0; i < n; ++i) top = std::max({top, a.band_db[i] - la, b.band_db[i] - lb});
    double d = 0.0;
    bool any = false;
    for (std::size_t i = 0; i < n; ++i) {
        const double ai = a.band_db[i] - la, bi = b.band_db[i] - lb;
        if (std::max(ai, bi) < top - t.band_floor_db) continue;
        d = std::max(d, std::abs(ai - bi));
        any = true;
    }
    return any ? d : std::numeric_limits<double>::quiet_NaN();
}

double brightness_db(const listening_measure& a, const listening_measure& b)
{
    auto share = [](const std::vector<double>& db, std::size_t n) {
        std::vector<double> hi;
        for (std::size_t i = 0; i < n; ++i)
            if (band_centre_hz(i) >= bright_from_hz * 0.99) hi.push_back(db[i]);  // the nominal 2 kHz band is 1995 Hz
        if (hi.empty()) return std::numeric_limits<double>::quiet_NaN();
        return std::max(share_floor_db, power_sum_db(hi) - power_sum_db(std::span(db).first(n)));
    };
    const std::size_t n = std::min(a.band_db.size(), b.band_db.size());
    const double d = share(a.band_db, n) - share(b.band_db, n);
    return std::isfinite(d) ? d : 0.0;
}

pair_verdict compare_for_listening(const listening_measure& a, const listening_measure& b, const listening_thresholds& t)
{
    pair_verdict v;
    v.level_db = a.rms_dbfs - b.rms_dbfs;
    v.spectral_db = spectral_distance_db(a, b, t);
    v.brightness_db = brightness_db(a, b);
    v.same_level = std::abs(v.level_db) < t.same_level_db;
    v.same_spectrum = v.spectral_db < t.spectral_jnd_db;  // NaN compares false
    return v;
}

listening_conclusions conclude(const std::vector<listening_measure>& m, const listening_thresholds& t)
{
    listening_conclusions c;
    const std::size_t n = m.size();
    c.summaries.resize(n);
    if (n == 0) return c;
    auto names_of = [&](const std::vector<std::size_t>& g) {
        std::vector<std::string> s;
        for (std::size_t i : g) s.push_back(m[i].name);
        return s;
    };
    // Contexts in order of first appearance; variants are grouped and compared within their own context only.
    std::vector<std::string> contexts;
    for (const auto& x : m)
        if (std::find(contexts.begin(), contexts.end(), x.context) == contexts.end()) contexts.push_back(x.context);
    c.reference_of.assign(n, 0);
    std::vector<std::size_t> group_of(n, 0);
    for (std::size_t ctx = 0; ctx < contexts.size(); ++ctx) {
        const std::size_t first_group = c.groups.size();
        // Greedy complete-linkage groups in variant order: a variant joins the first group it matches entirely.
        for (std::size_t i = 0; i < n; ++i) {
            if (m[i].context != contexts[ctx]) continue;
            bool placed = false;
            for (std::size_t g = first_group; g < c.groups.size() && !placed; ++g)
                if (std::all_of(c.groups[g].begin(), c.groups[g].end(),
                                [&](std::size_t j) { return compare_for_listening(m[i], m[j], t).indistinguishable(); })) {
                    c.groups[g].push_back(i);
                    placed = true;
                }
            if (!placed) c.groups.push_back({i});
        }
        std::size_t ref_group = first_group;
        for (std::size_t g = first_group + 1; g < c.groups.size(); ++g)
            if (c.groups[g].size() > c.groups[ref_group].size()) ref_group = g;
        const std::size_t reference = c.groups[ref_group][0];
        if (ctx == 0) c.reference = reference;
        for (std::size_t g = first_group; g < c.groups.size(); ++g)
            for (std::size_t i : c.groups[g]) {
                c.reference_of[i] = reference;
                group_of[i] = g;
            }
        std::string prefix = contexts[ctx].empty() ? std::string() : contexts[ctx] + ", ";
        if (!prefix.empty()) prefix[0] = static_cast<char>(std::toupper(static_cast<unsigned char>(prefix[0])));
        const std::string& ref = m[reference].name;
        for (std::size_t g = first_group; g < c.groups.size(); ++g)
            if (c.groups[g].size() > 1)
                c.sentences.push_back(fmt::format("{}{} sound the same (levels within {:g} dB, same tone colour).", prefix,
                                                  join_names(names_of(c.groups[g])), t.same_level_db));
        for (std::size_t g = first_group; g < c.groups.size(); ++g) {
            if (g == ref_group) continue;
            const auto& grp = c.groups[g];
            const pair_verdict v = compare_for_listening(m[grp[0]], m[reference], t);
            // Names keep their own spelling, even at the start of a sentence.
            c.sentences.push_back(fmt::format("{}{} {} {}.", prefix, join_names(names_of(grp)), grp.size() > 1 ? "are" : "is", describe(v, ref, t)));
        }
    }
    std::size_t loud = 0, quiet = 0;
    for (std::size_t i = 1; i < n; ++i) {
        if (m[i].rms_dbfs > m[loud].rms_dbfs) loud = i;
        if (m[i].rms_dbfs < m[quiet].rms_dbfs) quiet = i;
    }
    const double spread = m[loud].rms_dbfs - m[quiet].rms_dbfs;
    if (n > 1) {
        if (spread < t.same_level_db)
            c.sentences.push_back(fmt::format("All {} variants lie within {:g} dB of each other in level.", n, t.same_level_db));
        else
            c.sentences.push_back(fmt::format("The loudest is {} ({:.1f} dBFS RMS), the quietest {} ({:.1f} dBFS RMS): {:.1f} dB apart.",
                                              m[loud].name, m[loud].rms_dbfs, m[quiet].name, m[quiet].rms_dbfs, spread));
    }
    std::vector<std::string> distorting;
    bool any_thd = false;
    for (const auto& x : m) {
        if (!std::isfinite(x.thd_percent)) continue;
        any_thd = true;
        if (x.thd_percent > t.audible_thd_percent) distorting.push_back(fmt::format("{} ({:.1f} %)", x.name, x.thd_percent));
    }
    if (!distorting.empty())
        c.sentences.push_back(fmt::format("Audible distortion (THD above {:g} %): {}.", t.audible_thd_percent, join_names(distorting)));
    else if (any_thd)
        c.sentences.push_back(fmt::format("No variant distorts audibly (THD at or below {:g} % wherever it was measured).", t.audible_thd_percent));
    c.sentences.push_back(fmt::format(
        "Thresholds (rules of thumb, common practice): the same loudness within {:g} dB; the same tone colour when no "
        "third-octave band differs by {:g} dB or more once the levels are matched (bands within {:g} dB of the loudest); "
        "brighter or duller when the share of power from 2 kHz up changes by {:g} dB or more; audible distortion above {:g} % THD.",
        t.same_level_db, t.spectral_jnd_db, t.band_floor_db, t.brightness_db, t.audible_thd_percent));

    for (std::size_t i = 0; i < n; ++i) {
        const auto& grp = c.groups[group_of[i]];
        const std::size_t reference = c.reference_of[i];
        std::string s;
        if (grp.size() > 1) {
            std::vector<std::string> others;
            for (std::size_t j : grp)
                if (j != i) others.push_back(m[j].name);
            s = fmt::format("Sounds the same as {} (within {:g} dB, same tone colour)", join_names(others), t.same_level_db);
        } else if (i == reference) {
            s = "The reference the others are compared with";
        } else {
            s = describe(compare_for_listening(m[i], m[reference], t), m[reference].name, t);
            s[0] = static_cast<char>(std::toupper(static_cast<unsigned char>(s[0])));
        }
        s += fmt::format("; {:.1f} dBFS RMS", m[i].rms_dbfs);
        if (n > 1 && spread >= t.same_level_db) {
            if (i == loud) s += ", the loudest";
            if (i == quiet) s += ", the quietest";
        }
        if (std::isfinite(m[i].thd_percent))
            s += fmt::format("; THD {:.1f} %{}", m[i].thd_percent, m[i].thd_percent > t.audible_thd_percent ? " (audible)" : "");
        c.summaries[i] = s + ".";
    }
    return c;
}

listening_measure measure_listening(const std::filesystem::path& wav, const std::string& name, double thd_percent)
{
    double fs = 0.0;
    const std::vector<float> x = read_mono(wav, &fs);
    listening_measure m;
    m.name = name;
    m.thd_percent = thd_percent;
    double ss = 0.0;
    for (float v : x) ss += static_cast<double>(v) * v;
    const double rms = x.empty() ? 0.0 : std::sqrt(ss / static_cast<double>(x.size()));
    m.rms_dbfs = rms > 0.0 ? std::max(empty_band_db, 20.0 * std::log10(rms)) : empty_band_db;
    m.band_db = band_levels_db(x, fs);
    return m;
}

std::vector<listening_measure> measure_listening(const sweep_result& sw)
{
    std::vector<listening_measure> out;
    std::vector<double> carriers;
    for (const auto& r : sw.variants)
        if (r.scene.tuner.layout == tuner_layout::bench) carriers.push_back(r.scene.am.carrier_peak_v);
    // The generator's level sets what is comparable on the bench: a context per carrier level when they differ.
    const bool by_carrier = carriers.size() == sw.variants.size() && std::adjacent_find(carriers.begin(), carriers.end(),
                                                                                        std::not_equal_to<>()) != carriers.end();
    for (const auto& r : sw.variants) {
        double thd = std::numeric_limits<double>::quiet_NaN();
        if (r.metrics.contains("thd_percent") && r.metrics["thd_percent"].is_number()) thd = r.metrics["thd_percent"].get<double>();
        out.push_back(measure_listening(r.job.wav, r.spec.name, thd));
        if (by_carrier) out.back().context = "at the " + format_quantity(r.scene.am.carrier_peak_v, unit::volt, 4, true) + " carrier";
    }
    return out;
}

} // namespace galena
