#include "galena/report.hpp"

#include "galena/audio_io.hpp"
#include "galena/cancel.hpp"
#include "galena/error.hpp"
#include "galena/staged_output.hpp"

#include <fmt/format.h>

namespace galena {

namespace fs = std::filesystem;

pack_outcome make_pack(const fs::path& base_file, const std::vector<std::string>& base_overrides,
                       const std::vector<variant_spec>& variants, const fs::path& out_dir, const pack_options& opt)
{
    pack_outcome o;
    o.sweep = prepare_sweep(base_file, base_overrides, variants, opt.sweep);
    const auto& vs = o.sweep.variants;
    for (const auto& r : vs)
        if (r.scene.output.full_scale_v != vs[0].scene.output.full_scale_v)
            throw config_error(fmt::format("variant {}: output.full_scale_v = {}: a pack needs one calibration for every variant ({})",
                                           r.spec.name, r.scene.output.full_scale_v, vs[0].scene.output.full_scale_v));
    std::vector<fs::path> inputs = o.sweep.inputs;
    inputs.insert(inputs.end(), opt.protect.begin(), opt.protect.end());
    // Everything is staged beside out_dir and published at the end: a failure or Ctrl-C leaves no pack.
    staged_output staged(out_dir, opt.sweep.overwrite, inputs);
    check_sweep_outputs(o.sweep, staged);
    for (const char* f : {"index.html", "playlist.wav", "playlist.csv", "playlist-matched.wav", "playlist-matched.csv"}) {
        staged.check(f);
        staged.owns(f);
    }
    staged.owns("matched");
    staged.owns("plots");
    for (const auto& f : opt.extra_outputs) {
        staged.check(f);
        staged.owns(f);
    }
    const fs::path dir = staged.dir();
    o.page = dir / "index.html";
    o.playlist_wav = dir / "playlist.wav";
    o.playlist_csv = dir / "playlist.csv";
    with_described_errors(staged, [&] {
        render_sweep(o.sweep, dir, opt.sweep);
        pack_extras extra;
        if (opt.extras) extra = opt.extras(o.sweep, dir);
        std::string extra_html = std::move(extra.html);
        std::vector<fs::path> wavs;
        std::vector<std::string> names, labels;
        for (const auto& r : vs) {
            wavs.push_back(r.job.wav);
            names.push_back(r.spec.name);
            labels.push_back(r.spec.label);
        }
        for (const auto& it : extra.playlist_items) {
            wavs.push_back(it.wav);
            names.push_back(it.name);
            labels.push_back(it.label);
        }
        const wav_format fmt_ = vs[0].scene.output.format;
        throw_if_cancelled();
        std::vector<warning> playlist_warnings;
        o.playlist = write_playlist(wavs, names, labels, o.playlist_wav, o.playlist_csv, fmt_, {}, &playlist_warnings);
        std::vector<playlist_segment> matched_playlist;
        if (opt.loudness_matched) {
            throw_if_cancelled();
            o.matched = write_loudness_matched(wavs, names, dir / "matched", fmt_);
            std::vector<fs::path> mw;
            for (const auto& g : o.matched) mw.push_back(g.wav);
            std::vector<warning> unused; // the same speech as above: its warning is already there
            matched_playlist = write_playlist(mw, names, labels, dir / "playlist-matched.wav", dir / "playlist-matched.csv", fmt_, {}, &unused);
        }
        pack_page page;
        page.title = opt.title;
        page.note = opt.note;
        page.extra_html = extra_html;
        page.dir = dir;
        page.sweep = &o.sweep;
        page.playlist = o.playlist;
        page.playlist_wav = o.playlist_wav;
        page.matched = o.matched;
        page.matched_playlist = std::move(matched_playlist);
        if (!page.matched_playlist.empty()) page.matched_playlist_wav = dir / "playlist-matched.wav";
        page.listening = measure_listening(o.sweep);
        pack_plots plots = draw_pack_plots(o.sweep, dir / "plots", opt.curves);
        page.plot_stems = std::move(plots.stems);
        o.warnings = std::move(plots.warnings);
        o.warnings.insert(o.warnings.end(), playlist_warnings.begin(), playlist_warnings.end());
        write_text_atomic(o.page, render_page(page));
        throw_if_cancelled();
        staged.publish();
    });
    relocate(o.sweep, staged);
    for (fs::path* p : {&o.page, &o.playlist_wav, &o.playlist_csv}) *p = staged.published(*p);
    for (auto& g : o.matched) g.wav = staged.published(g.wav);
    return o;
}

} // namespace galena
