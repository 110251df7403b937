// The workbench server through its HTTP API: a render equals the library's render of the same scenario, bad
// input gets the CLI's one-line message, a newer change cancels the stale render, limits and traversal
// attempts are refused, and a bounded load leaves no crash, no lost answer, no leak and no temporary file.
#include "cli_support.hpp"

#include "galena/cancel.hpp"
#include "galena/characterize.hpp"
#include "galena/job.hpp"
#include "galena/scenario.hpp"
#include "galena/workbench.hpp"

#include <httplib.h>
#include <malloc.h>
#include <nlohmann/json.hpp>

#include <atomic>
#include <doctest/doctest.h>
#include <future>
#include <mutex>

using namespace galena_test;
using nlohmann::json;

namespace {

const fs::path source_dir = GALENA_SOURCE_DIR;
const fs::path base_scenario = source_dir / "scenarios" / "workbench.toml";
const fs::path test_tmp = fs::path(GALENA_TEST_TMP) / "workbench";

/// A clips folder for the server: one real clip, a link to it and a link out of the folder (neither link
/// may be served).
fs::path clips_folder()
{
    const fs::path d = fresh_dir(test_tmp, "clips");
    fs::copy_file(source_dir / "audio-samples" / "tone-1khz.wav", d / "tone-1khz.wav");
    fs::create_symlink(d / "tone-1khz.wav", d / "linked.wav");
    fs::create_symlink("/etc/passwd", d / "outside.wav");
    return d;
}

galena::workbench_options options(const std::string& name)
{
    galena::workbench_options o;
    o.base_scenario = base_scenario;
    o.clips_dir = clips_folder();
    o.temp_parent = fresh_dir(test_tmp, name);
    o.port = 0;
    return o;
}

struct answer {
    int status = 0;
    json body;
    std::string raw;
};

answer post(int port, const std::string& path, const std::string& body, const std::string& type = "application/json")
{
    httplib::Client c("127.0.0.1", port);
    c.set_read_timeout(120, 0);
    const auto r = c.Post(path.c_str(), body, type.c_str());
    REQUIRE_MESSAGE(r, "no answer to POST " << path);
    answer a{r->status, json(), r->body};
    if (r->get_header_value("Content-Type") == "application/json") a.body = json::parse(r->body);
    return a;
}

answer get(int port, const std::string& path)
{
    httplib::Client c("127.0.0.1", port);
    const auto r = c.Get(path.c_str());
    REQUIRE_MESSAGE(r, "no answer to GET " << path);
    answer a{r->status, json(), r->body};
    if (r->get_header_value("Content-Type") == "application/json") a.body = json::parse(r->body);
    return a;
}

/// The message `galena render BASE --set ...` prints after "galena: error: " (one line).
std::string cli_message(const std::vector<std::string>& sets, const std::string& name)
{
    std::string args = "render " + q(base_scenario) + " --quiet --out " + q(test_tmp / name / "out");
    for (const auto& s : sets) args += " --set " + q(s);
    const auto r = galena_cli(args, test_tmp / name);
    CHECK(r.rc == 2);
    std::string line = r.err;
    const std::string prefix = "galena: error: ";
    REQUIRE(line.starts_with(prefix));
    line = line.substr(prefix.size());
    while (!line.empty() && line.back() == '\n') line.pop_back();
    return line;
}

std::size_t resident_bytes()
{
    std::ifstream in("/proc/self/statm");
    std::size_t pages = 0, resident = 0;
    in >> pages >> resident;
    return resident * static_cast<std::size_t>(sysconf(_SC_PAGESIZE));
}

/// Bytes the allocator has handed out and not had back, over every arena (glibc's mallinfo2: uordblks plus
/// mmapped blocks): what a leak grows. The resident size also holds freed memory the allocator keeps.
std::size_t heap_in_use_bytes()
{
    const struct mallinfo2 mi = mallinfo2();
    return mi.uordblks + mi.hblkhd;
}

/// Waits (bounded) until `done()` holds.
template <class F>
bool eventually(F done, double seconds = 60.0)
{
    const auto until = std::chrono::steady_clock::now() + std::chrono::duration<double>(seconds);
    while (std::chrono::steady_clock::now() < until) {
        if (done()) return true;
        std::this_thread::sleep_for(std::chrono::milliseconds(5));
    }
    return done();
}

} // namespace

TEST_CASE("a render through the HTTP API has the metrics of the library's render of the same scenario")
{
    galena::workbench bench(options("render"));
    const json body = {{"load.bleeder_ohm", "22k"}, {"signal.duration_s", 0.3}, {"earpiece.capacitance_f", "4.7nF"}};
    const auto a = post(bench.port(), "/api/render?session=one", body.dump());
    REQUIRE_MESSAGE(a.status == 200, a.raw);

    // The same scenario, rendered by the library directly (the --set texts the server builds from the body).
    const auto s = galena::load_scenario(base_scenario, {"load.bleeder_ohm=22k", "signal.duration_s=0.3", "earpiece.capacitance_f=4.7nF"});
    const fs::path dir = fresh_dir(test_tmp, "render-direct");
    // As the server runs it: a second core when one is free (the split is deterministic, so both split
    // alike; segmented_render_test bounds the split's difference from the one-core render).
    galena::job_options jo;
    jo.use_second_core = true;
    const auto o = galena::render_job_into(s, dir, jo);
    CHECK(a.body["metrics"] == o.metrics); // every key and every number identical
    CHECK(a.body["warnings"] == json(galena::warning_messages(o.warnings)));
    CHECK(a.body["warning_codes"] == json(galena::warning_code_names(o.warnings)));
    CHECK(a.body["metrics"]["dc_v"].get<double>() > 0.0);

    // The audio is the render's WAV, byte for byte.
    const auto wav = get(bench.port(), a.body["audio_url"].get<std::string>());
    CHECK(wav.status == 200);
    CHECK(wav.raw == slurp(o.wav));

    // The presets, the clips (links are not offered) and the base values.
    const auto presets = get(bench.port(), "/api/presets");
    REQUIRE(presets.status == 200);
    CHECK(presets.body.size() == galena::diode_presets().size());
    CHECK(presets.body[0]["name"] == std::string(galena::diode_presets()[0].name));
    const auto clips = get(bench.port(), "/api/clips");
    REQUIRE(clips.status == 200);
    REQUIRE(clips.body.size() == 1);
    CHECK(clips.body[0]["name"] == "tone-1khz.wav");
    const auto defaults = get(bench.port(), "/api/defaults");
    CHECK(defaults.body["values"]["load.bleeder_ohm"].get<double>() == 47e3);
    // The page is served, built in.
    const auto page = get(bench.port(), "/");
    CHECK(page.status == 200);
    CHECK(page.raw.find("galena workbench") != std::string::npos);

    // The transfer curve is the library's, for the same circuit and carrier, with this setup's level marked.
    const auto tc = post(bench.port(), "/api/transfer", body.dump());
    REQUIRE_MESSAGE(tc.status == 200, tc.raw);
    galena::characterize_settings cs;
    cs.carrier_hz = s.am.carrier_hz;
    cs.render.audio_rate_hz = s.render.audio_rate_hz;
    cs.band_high_hz = std::min(10000.0, 0.5 * s.render.audio_rate_hz);
    cs.tone_hz = s.programme.tone_hz;
    cs.modulation_index = s.am.modulation_index;
    json direct = galena::to_json(galena::measure_transfer_curve(s.circuit, galena::log_spaced(0.01, 3.0, 9), cs));
    direct["operating_carrier_peak_v"] = s.am.carrier_peak_v;
    CHECK(tc.body == direct);

    // The setup as a scenario file: it loads back to the same circuit.
    const auto toml = post(bench.port(), "/api/scenario", body.dump());
    REQUIRE(toml.status == 200);
    const fs::path saved = test_tmp / "render-direct" / "saved.toml";
    write_file(saved, toml.raw);
    const auto back = galena::load_scenario(saved);
    CHECK(back.circuit.load.bleeder_ohm == 22e3);
    CHECK(back.circuit.earpiece.capacitance_f == s.circuit.earpiece.capacitance_f);
    CHECK(back.programme.duration_s == 0.3);
}

TEST_CASE("a base set by its tuning capacitor: \"tuned to\" starts blank and keeps the capacitor; a frequency typed there replaces it")
{
    auto o = options("dial-capacitor");
    o.base_scenario = source_dir / "scenarios" / "crystal-set.toml"; // tuner.capacitance_f = 104.45e-12
    galena::workbench bench(o);
    const auto defaults = get(bench.port(), "/api/defaults");
    REQUIRE(defaults.status == 200);
    CHECK_FALSE(defaults.body["values"].contains("tuner.tuned_hz"));
    CHECK(defaults.body["values"]["tuner.coil_h"].get<double>() == 240e-6);
    // The page sends no blank optional field: the scenario keeps its capacitor.
    const auto kept = post(bench.port(), "/api/scenario", json{{"load.bleeder_ohm", "68k"}}.dump());
    REQUIRE_MESSAGE(kept.status == 200, kept.raw);
    const fs::path d = test_tmp / "dial-capacitor";
    write_file(d / "kept.toml", kept.raw);
    CHECK(galena::load_scenario(d / "kept.toml").tuner.capacitance_f == 104.45e-12);
    const auto moved = post(bench.port(), "/api/scenario", json{{"tuner.tuned_hz", "990k"}}.dump());
    REQUIRE_MESSAGE(moved.status == 200, moved.raw);
    write_file(d / "moved.toml", moved.raw);
    const auto back = galena::load_scenario(d / "moved.toml");
    CHECK(back.tuner.capacitance_f == 0.0);
    CHECK(back.tuner.tuned_hz == 990e3);
}

TEST_CASE("physics through the API: a smaller bleeder discharges the filter more, so the DC level falls")
{
    // The detector's DC output is the carrier peak less the drop that the load current makes across the
    // diode and source: a smaller load resistance draws more current and leaves a lower DC level (the
    // peak-detector load line; any diode-detector text, e.g. Terman's Radio Engineers' Handbook, detector
    // section, from memory). Checked as a direction, not a value.
    galena::workbench bench(options("physics"));
    std::vector<double> dc;
    for (const char* r : {"1M", "100k", "10k"}) {
        const auto a = post(bench.port(), "/api/render?session=p", json{{"load.bleeder_ohm", r}, {"signal.duration_s", 0.3}}.dump());
        REQUIRE_MESSAGE(a.status == 200, a.raw);
        dc.push_back(a.body["metrics"]["dc_v"].get<double>());
    }
    CHECK(dc[0] > dc[1]);
    CHECK(dc[1] > dc[2]);
}

TEST_CASE("a bad value gets HTTP 400 with the CLI's one-line message")
{
    galena::workbench bench(options("bad"));
    const int port = bench.port();
    struct bad_case {
        json body;
        std::vector<std::string> sets;
    };
    const std::vector<bad_case> cases = {
        {{{"load.bleeder_ohm", -5}}, {"load.bleeder_ohm=-5"}},
        {{{"load.bleeder_ohm", "47q"}}, {"load.bleeder_ohm=47q"}},
        {{{"load.bleeder", "47k"}}, {"load.bleeder=47k"}},
        {{{"bleeder_ohm", "47k"}}, {"bleeder_ohm=47k"}},
        {{{"diode.preset", "no-such-diode"}}, {"diode.preset=no-such-diode"}},
        {{{"signal.modulation_index", 30}}, {"signal.modulation_index=30"}},
    };
    for (std::size_t i = 0; i < cases.size(); ++i) {
        CAPTURE(cases[i].body.dump());
        const auto a = post(port, "/api/render?session=bad", cases[i].body.dump());
        CHECK(a.status == 400);
        CHECK(a.body["error"].get<std::string>() == cli_message(cases[i].sets, "bad-" + std::to_string(i)));
    }
}

TEST_CASE("malformed requests get 4xx one-line answers")
{
    auto o = options("malformed");
    galena::workbench bench(o);
    const int port = bench.port();
    const auto refused = [&](const std::string& body, int status, const std::string& part) {
        CAPTURE(body.substr(0, 80));
        const auto a = post(port, "/api/render?session=m", body);
        CHECK(a.status == status);
        const std::string e = a.body.value("error", std::string());
        CHECK_MESSAGE(e.find(part) != std::string::npos, e);
        CHECK(e.find('\n') == std::string::npos);
    };
    refused("{\"load.bleeder_ohm\": ", 400, "malformed JSON");
    refused("[1, 2]", 400, "must be a JSON object");
    refused("{\"load.bleeder_ohm\": null}", 400, "must be a number, a string");
    refused("{\"load.bleeder_ohm\": [47000]}", 400, "not array");
    refused("{\"load.bleeder_ohm\": {\"v\": 1}}", 400, "not object");
    refused("{\"load.bleeder_ohm=1\": 5}", 400, "must look like section.key");
    refused("{\"load.bleeder_ohm\": \"47k\\nload.x = 1\"}", 400, "one line");
    refused("{\"signal.duration_s\": 6}", 400, "at most 5 s");
    refused(json{{"load.bleeder_ohm", std::string(o.max_body_bytes, '4')}}.dump(), 413, "limit");
    refused(std::string(o.max_upload_bytes + 10, ' '), 413, "limit"); // past the server's payload cap
    // Session ids are names, not paths.
    const auto a = post(port, "/api/render?session=../x", "{}");
    CHECK(a.status == 400);
    CHECK(bench.stats().renders_done == 0);
}

TEST_CASE("paths in requests are refused: traversal, absolute paths, links, other sessions' uploads")
{
    galena::workbench bench(options("paths"));
    const int port = bench.port();
    const std::vector<std::string> clips = {"../audio-samples/tone-1khz.wav", "/etc/passwd", "..", "linked.wav", "outside.wav",
                                            (source_dir / "audio-samples" / "tone-1khz.wav").string(), "upload:1", "upload:../1",
                                            "./tone-1khz.wav"};
    // The bench generator's programme and the receiver station's take the same names, never a path.
    for (const std::string key : {"signal.audio", "station.audio"})
        for (const auto& clip : clips) {
            CAPTURE(key);
            CAPTURE(clip);
            const auto a = post(port, "/api/render?session=t", json{{key, clip}, {"signal.duration_s", 0.3}}.dump());
            CHECK(a.status == 400);
            CHECK(a.body["error"].get<std::string>().find("never a path") != std::string::npos);
        }
    for (const std::string key : {"diode.file", "station.1.audio", "station.2.file"}) {
        const auto a = post(port, "/api/render?session=t", json{{key, "/etc/passwd"}}.dump());
        CHECK(a.status == 400);
        CHECK(a.body["error"].get<std::string>().find("no file paths") != std::string::npos);
    }
    // The bundled clip by its name renders.
    const auto ok = post(port, "/api/render?session=t", json{{"signal.audio", "tone-1khz.wav"}, {"signal.duration_s", 0.3}}.dump());
    CHECK_MESSAGE(ok.status == 200, ok.raw);
    // The same clip as the programme of a receiver layout's one station: the whole receiver at RF renders, and
    // its loaded Q is below the coil's unloaded 200 (a detector across a tuned circuit only adds loss).
    const auto rx = post(port, "/api/render?session=t",
                         json{{"tuner.layout", "single-coil"}, {"station.carrier_hz", "1MHz"}, {"station.field_v_per_m", "10m"},
                              {"station.audio", "tone-1khz.wav"}, {"signal.duration_s", 0.3}}
                             .dump());
    REQUIRE_MESSAGE(rx.status == 200, rx.raw);
    CHECK(rx.body["metrics"]["loaded_q"].get<double>() > 1.0);
    CHECK(rx.body["metrics"]["loaded_q"].get<double>() < 200.0);
    // Audio URLs name a session and a number, nothing else.
    for (const std::string path : {"/audio/../../etc/passwd", "/audio/t/../../../etc/passwd", "/audio/t/1.wav/../../x", "/audio/t/%2e%2e/1.wav",
                                   "/audio/t/999.wav", "/audio/other/1.wav", "/etc/passwd", "/../../etc/passwd"}) {
        CAPTURE(path);
        const auto a = get(port, path);
        CHECK(a.status == 404);
        CHECK(a.raw.find("root:") == std::string::npos);
    }
    CHECK(get(port, ok.body["audio_url"].get<std::string>()).status == 200);

    // Uploads: a WAV is kept in the session's folder and renders; garbage is refused; another session cannot use it.
    const auto up = post(port, "/api/upload?session=t", slurp(source_dir / "audio-samples" / "tone-400hz.wav"), "audio/wav");
    REQUIRE_MESSAGE(up.status == 200, up.raw);
    const std::string clip = up.body["clip"];
    CHECK(clip == "upload:1");
    const auto mine = post(port, "/api/render?session=t", json{{"signal.audio", clip}, {"signal.duration_s", 0.3}}.dump());
    CHECK_MESSAGE(mine.status == 200, mine.raw);
    CHECK(mine.body["metrics"]["dc_v"].get<double>() > 0.0);
    const auto theirs = post(port, "/api/render?session=u", json{{"signal.audio", clip}, {"signal.duration_s", 0.3}}.dump());
    CHECK(theirs.status == 400);
    // A fitted diode file: uploaded, it renders as the library renders the same file; a bad one is refused
    // with the library's message; a path or another session's file is refused.
    const std::string diode_text = "[diode]\nsaturation_current_a = 2e-7\nemission_coefficient = 1.2\nseries_resistance_ohm = 30\n";
    const auto d = post(port, "/api/upload-diode?session=t", diode_text, "application/toml");
    REQUIRE_MESSAGE(d.status == 200, d.raw);
    CHECK(d.body["diode"] == "upload:d1");
    const auto with_file = post(port, "/api/render?session=t", json{{"diode.file", "upload:d1"}, {"signal.duration_s", 0.3}}.dump());
    REQUIRE_MESSAGE(with_file.status == 200, with_file.raw);
    const fs::path diode_copy = fresh_dir(test_tmp, "paths-diode") / "diode.toml";
    write_file(diode_copy, diode_text);
    const auto direct = galena::render_job_into(
        galena::load_scenario(base_scenario, {"diode.file=" + diode_copy.string(), "signal.duration_s=0.3"}), diode_copy.parent_path(), {});
    CHECK(with_file.body["metrics"] == direct.metrics);
    const auto bad_diode = post(port, "/api/upload-diode?session=t", "[diode]\nemission_coefficient = 50\n", "application/toml");
    CHECK(bad_diode.status == 400);
    CHECK(bad_diode.body["error"].get<std::string>().find("diode.emission_coefficient") != std::string::npos);
    CHECK(post(port, "/api/render?session=u", json{{"diode.file", "upload:d1"}}.dump()).status == 400);
    CHECK(post(port, "/api/render?session=t", json{{"diode.file", "upload:d1/../../x"}}.dump()).status == 400);

    const auto junk = post(port, "/api/upload?session=t", "this is not audio", "audio/wav");
    CHECK(junk.status == 400);
    CHECK(junk.body["error"].get<std::string>().find("not an audio file") != std::string::npos);
}

TEST_CASE("a newer change of the same session cancels its stale render; other sessions are left alone")
{
    galena::workbench bench(options("cancel"));
    const int port = bench.port();
    // A 5 s excerpt (seconds of work) is started, then replaced by a short one once it is on a thread.
    auto stale = std::async(std::launch::async, [&] {
        return post(port, "/api/render?session=c", json{{"signal.duration_s", 5}, {"load.bleeder_ohm", "10k"}}.dump());
    });
    auto other = std::async(std::launch::async, [&] {
        return post(port, "/api/render?session=d", json{{"signal.duration_s", 0.5}}.dump());
    });
    REQUIRE(eventually([&] { return fs::exists(bench.temp_dir() / "s-c" / "r1"); }));
    const auto t0 = std::chrono::steady_clock::now();
    const auto fresh = post(port, "/api/render?session=c", json{{"signal.duration_s", 0.3}}.dump());
    const auto old = stale.get();
    const double waited = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    CHECK_MESSAGE(fresh.status == 200, fresh.raw);
    CHECK(old.status == 409);
    CHECK(old.body["error"].get<std::string>().find("newer change") != std::string::npos);
    CHECK(fresh.body["render_id"] == 2);
    CHECK(!fs::exists(bench.temp_dir() / "s-c" / "r1")); // the stale render's files are gone
    CHECK(other.get().status == 200);                     // the other session's render was not touched
    const auto st = bench.stats();
    CHECK(st.renders_cancelled == 1);
    CHECK(st.renders_done == 2);
    MESSAGE("stale render replaced; fresh answer after " << waited << " s");
}

TEST_CASE("limits: renders queue with a bound, sessions are bounded, Ctrl-C stops and cleans up")
{
    SUBCASE("a full queue is refused with 503; shutdown stops the running and the waiting render")
    {
        auto o = options("queue");
        o.render_threads = 1;
        o.queue_limit = 1;
        auto bench = std::make_unique<galena::workbench>(o);
        const int port = bench->port();
        const fs::path temp = bench->temp_dir();
        auto running = std::async(std::launch::async, [&] { return post(port, "/api/render?session=a", json{{"signal.duration_s", 5}}.dump()); });
        REQUIRE(eventually([&] { return bench->stats().renders_running == 1; }));
        auto waiting = std::async(std::launch::async, [&] { return post(port, "/api/render?session=b", json{{"signal.duration_s", 5}}.dump()); });
        REQUIRE(eventually([&] { return bench->stats().renders_waiting == 1; }));
        const auto full = post(port, "/api/render?session=c", json{{"signal.duration_s", 0.3}}.dump());
        CHECK(full.status == 503);
        CHECK(full.body["error"].get<std::string>().find("busy") != std::string::npos);
        bench->stop();
        CHECK(running.get().status == 503);
        CHECK(waiting.get().status == 503);
        CHECK(!fs::exists(temp));
        bench.reset();
    }
    SUBCASE("sessions: idle ones make room, busy ones are not dropped")
    {
        auto o = options("sessions");
        o.max_sessions = 2;
        o.render_threads = 1;
        galena::workbench bench(o);
        const int port = bench.port();
        const auto first = post(port, "/api/render?session=x", json{{"signal.duration_s", 0.3}}.dump());
        REQUIRE(first.status == 200);
        CHECK(post(port, "/api/render?session=y", json{{"signal.duration_s", 0.3}}.dump()).status == 200);
        CHECK(post(port, "/api/render?session=z", json{{"signal.duration_s", 0.3}}.dump()).status == 200); // x, the oldest idle one, goes
        CHECK(get(port, first.body["audio_url"].get<std::string>()).status == 404);
        CHECK(bench.stats().sessions == 2);
        auto busy1 = std::async(std::launch::async, [&] { return post(port, "/api/render?session=y", json{{"signal.duration_s", 5}}.dump()); });
        REQUIRE(eventually([&] { return bench.stats().renders_running == 1; }));
        auto busy2 = std::async(std::launch::async, [&] { return post(port, "/api/render?session=z", json{{"signal.duration_s", 5}}.dump()); });
        REQUIRE(eventually([&] { return bench.stats().renders_waiting == 1; }));
        const auto refused = post(port, "/api/render?session=w", json{{"signal.duration_s", 0.3}}.dump());
        CHECK(refused.status == 503);
        CHECK(refused.body["error"].get<std::string>().find("sessions") != std::string::npos);
        // Ctrl-C: the process-wide cancel request ends serve_until_cancelled, which stops the renders and
        // removes the temporary folder.
        const fs::path temp = bench.temp_dir();
        auto serving = std::async(std::launch::async, [&] { bench.serve_until_cancelled(); });
        galena::request_cancel(0);
        serving.get();
        galena::reset_cancel();
        CHECK(busy1.get().status == 503);
        CHECK(busy2.get().status == 503);
        CHECK(!fs::exists(temp));
    }
}

TEST_CASE("load: 200 requests from 16 loopback clients, good and bad mixed")
{
    auto o = options("load");
    const fs::path temp_parent = o.temp_parent;
    auto bench = std::make_unique<galena::workbench>(o);
    const int port = bench->port();
    const fs::path temp = bench->temp_dir();
    constexpr int clients = 16;
    constexpr int per_client = 200 / clients + 1; // 13 x 16 = 208 >= 200; the loop below stops at 200
    // Good requests cycle through four bleeders, all met in the warm-up: FFTW keeps what it learns about each
    // new transform length (its planner's tables), and a new circuit brings new analysis lengths; that is the
    // library's bounded cache, not the server's growth.
    const auto good_body = [](int k) {
        static const char* values[] = {"10k", "22k", "47k", "100k"};
        return json{{"load.bleeder_ohm", values[k % 4]}, {"signal.duration_s", 0.2}}.dump();
    };
    const std::vector<std::string> bad = {"{\"load.bleeder_ohm\": -1}", "{oops", "{\"signal.audio\": \"../../etc/passwd\"}", "[]",
                                          "{\"load.bleeder_ohm\": [1]}", "{\"nosuch.key\": 1}"};

    // Each client sends its share of `total` requests in turn on one keep-alive connection, a third of them bad.
    struct tally {
        std::atomic<int> issued{0}, good_sent{0}, good_ok{0}, bad_sent{0}, bad_4xx{0}, other{0};
        std::mutex m;
        std::vector<std::string> surprises;
    };
    const auto run_clients = [&](int total, tally& t) {
        std::vector<std::thread> threads;
        for (int c = 0; c < clients; ++c) {
            threads.emplace_back([&, c] {
                httplib::Client client("127.0.0.1", port);
                client.set_read_timeout(120, 0);
                for (int k = 0; k < per_client; ++k) {
                    if (t.issued.fetch_add(1) >= total) return; // bounded: `total` requests in all
                    const bool is_good = (c + k) % 3 != 0;
                    const std::string body = is_good ? good_body(c * per_client + k) : bad[static_cast<std::size_t>(c + k) % bad.size()];
                    const auto tq = std::chrono::steady_clock::now();
                    const auto r = client.Post(fmt::format("/api/render?session=c{}", c).c_str(), body, "application/json");
                    const double took = std::chrono::duration<double>(std::chrono::steady_clock::now() - tq).count();
                    const int status = r ? r->status : -1;
                    if (is_good) {
                        ++t.good_sent;
                        if (status == 200 && json::parse(r->body).contains("metrics")) ++t.good_ok;
                        else {
                            std::lock_guard lock(t.m);
                            t.surprises.push_back(fmt::format("good request {} of client {} answered {} after {:.3f} s: {}", k, c, status, took, r ? r->body : httplib::to_string(r.error())));
                        }
                    } else {
                        ++t.bad_sent;
                        if (status >= 400 && status < 500 && json::parse(r->body).contains("error")) ++t.bad_4xx;
                        else ++t.other;
                    }
                }
            });
        }
        for (auto& th : threads) th.join();
    };

    // Warm-up: the same traffic, 200 requests, so that the baseline holds the threads, connections, malloc
    // arenas and caches that serving makes; then the load proper. (Four more rounds of 200 grew the heap by
    // 54, 27, 12 and 18 KiB: caches filling towards a bound, not a leak that grows with the requests.)
#if !defined(__SANITIZE_ADDRESS__) // the memory figures are skipped under AddressSanitizer (below): no baseline to warm
    tally warm;
    run_clients(200, warm);
    for (const auto& s : warm.surprises) MESSAGE(s);
    REQUIRE(warm.good_ok == warm.good_sent);
#endif
    malloc_trim(0);
    const std::size_t baseline = resident_bytes();
    const std::size_t heap_baseline = heap_in_use_bytes();

    tally t;
    run_clients(200, t);
    auto& surprises = t.surprises;
    auto& good_sent = t.good_sent;
    auto& good_ok = t.good_ok;
    auto& bad_sent = t.bad_sent;
    auto& bad_4xx = t.bad_4xx;
    auto& other = t.other;
    for (const auto& s : surprises) MESSAGE(s);
    CHECK(good_sent + bad_sent == 200);
    CHECK(good_ok == good_sent);
    CHECK(bad_4xx == bad_sent);
    CHECK(other == 0);
    CHECK(get(port, "/api/presets").status == 200); // still serving
    malloc_trim(0);
    const std::size_t after = resident_bytes();
    const std::size_t heap_after = heap_in_use_bytes();
    MESSAGE("heap in use: " << heap_baseline / 1024 << " KiB after warm-up, " << heap_after / 1024 << " KiB after 200 requests; resident: "
                            << baseline / 1024 << " KiB, " << after / 1024 << " KiB; " << good_sent.load() << " good, "
                            << bad_sent.load() << " bad");
#if defined(__SANITIZE_ADDRESS__)
    // AddressSanitizer keeps freed memory in quarantine and replaces the allocator: neither figure means
    // anything here; its leak checker reports leaks at exit instead.
    MESSAGE("memory checks skipped under AddressSanitizer");
#else
    // Memory back to its baseline within 10 % (the bound): the resident size grows by 1 to 5 % after
    // a 200-request warm-up (measured over 8 runs; after a 48-request warm-up it was 3 to 11 %, the arenas and
    // cached stacks of the renders' second-core threads still filling). A per-request leak shows up in the
    // heap figure below.
    CHECK(static_cast<double>(after) <= 1.10 * static_cast<double>(baseline));
    // And no leak hides in it: the allocator's bytes in use grow by less than 512 KiB over the 200 requests
    // (measured: 150 to 170 KiB, the per-thread caches of HTTP threads met for the first time). Keeping one
    // render's metrics or samples per request would add 2.5 MiB or more (0.2 s of float samples at 24 kHz
    // is 19 KiB, times the 130-odd good requests).
    CHECK(heap_after < heap_baseline + (512u << 10));
#endif
    bench.reset(); // stop and clean up
    CHECK(!fs::exists(temp));
    CHECK(fs::is_empty(temp_parent));
}

TEST_CASE("galena workbench: prints its address, serves, and Ctrl-C stops it and removes its folder")
{
    REQUIRE(std::string(GALENA_CLI).size() > 0);
    const fs::path dir = fresh_dir(test_tmp, "cli");
    const fs::path tmp = fresh_dir(test_tmp, "cli-tmp");
    std::fflush(nullptr); // nothing buffered is written twice by the child
    const pid_t pid = fork();
    REQUIRE(pid >= 0);
    if (pid == 0) {
        (void)freopen((dir / "stdout.txt").c_str(), "w", stdout);
        (void)freopen((dir / "stderr.txt").c_str(), "w", stderr);
        setenv("TMPDIR", tmp.c_str(), 1);
        execl(GALENA_CLI, GALENA_CLI, "workbench", "--port", "0", static_cast<char*>(nullptr));
        _exit(127);
    }
    std::string out;
    REQUIRE(eventually([&] {
        out = slurp(dir / "stdout.txt");
        return out.find("http://127.0.0.1:") != std::string::npos && out.find('\n') != std::string::npos;
    }, 30.0));
    const auto at = out.find("http://127.0.0.1:") + 17;
    const int port = std::stoi(out.substr(at));
    CHECK(get(port, "/api/presets").status == 200);
    CHECK(!fs::is_empty(tmp)); // its private folder
    kill(pid, SIGINT);
    int status = 0;
    REQUIRE(waitpid(pid, &status, 0) == pid);
    CHECK(WIFEXITED(status));
    CHECK(WEXITSTATUS(status) == 0);
    CHECK(fs::is_empty(tmp));
    CHECK(slurp(dir / "stderr.txt").find("temporary folder removed") != std::string::npos);
}
