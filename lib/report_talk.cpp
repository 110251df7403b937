#include "galena/report_talk.hpp"

#include "galena/report_page.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <nlohmann/json.hpp>

namespace galena::detail {

namespace {

// Okabe-Ito colours (distinguishable for colour-blind viewers); the reference is also drawn dashed.
constexpr const char* this_colour = "#d55e00";
constexpr const char* ref_colour = "#0072b2";

double band_centre_hz(std::size_t i) { return 1000.0 * std::pow(10.0, (static_cast<double>(i) - 10.0) / 10.0); }

} // namespace

std::size_t partner_of(const talk_data& d, std::size_t i)
{
    const std::size_t n = d.items.size();
    const auto& ref = d.conclusions.reference_of;
    if (n < 2) return i;
    if (ref.size() != n) return i == 0 ? 1 : 0;
    if (ref[i] != i) return ref[i];
    for (std::size_t k = 1; k < n; ++k)  // the reference itself: the next variant of its context
        if (ref[(i + k) % n] == i) return (i + k) % n;
    return (i + 1) % n;
}

std::string talk_css()
{
    return R"css(
.talk-open{font-size:1.1em;padding:.4em 1em;margin:.5em 0}
.conclusions li{margin:.3em 0;font-size:1.05em}
#quiz{border:1px solid #999;padding:.5em 1em;margin:1em 0;max-width:60em}
#quiz button{font-size:1em;padding:.3em .8em;margin:.2em}
#quiz .players span{display:inline-block;margin-right:1.5em}
#quiz-answer{font-weight:bold;min-height:1.3em}
#quiz-note{background:#f4f4f4;padding:.4em .6em}
.presenter{position:fixed;inset:0;background:#fff;color:#111;z-index:10;overflow:auto;font-family:sans-serif}
.presenter .slide{padding:2vh 4vw;height:96vh;box-sizing:border-box;display:flex;flex-direction:column}
.presenter .slide[hidden]{display:none}
.presenter .p-count{font-size:2.4vh;color:#555}
.presenter .p-name{font-size:7vh;margin:.5vh 0;line-height:1.1}
.presenter .p-label{font-size:3.2vh;margin:.3vh 0;color:#333}
.presenter .p-summary{font-size:4vh;margin:1vh 0;line-height:1.25}
.presenter .p-plot{flex:1;min-height:0}
.presenter .p-plot svg{width:100%;height:100%;max-height:58vh}
.presenter .p-controls{font-size:3.4vh;display:flex;gap:2vw;align-items:center;flex-wrap:wrap}
.presenter button{font-size:3.4vh;padding:.4vh 1.6vw}
.presenter button.on{background:#0072b2;color:#fff}
.presenter .p-keys{font-size:2.2vh;color:#555;margin-top:1vh}
)css";
}

std::string quiz_html(const talk_data& d)
{
    const bool matched = !d.items.empty() && !d.items[0].matched_wav.empty();
    std::string opts;
    for (std::size_t i = 0; i < d.items.size(); ++i)
        opts += fmt::format("<option value=\"{}\">{}</option>", i, html_escape(d.items[i].name));
    std::string h = "<h2 id=\"blind-test\">Blind listening test</h2>\n<section id=\"quiz\">\n";
    h += fmt::format(
        "<p>The room hears A, B and X, where X is A or B drawn from a seeded pseudo-random sequence (mulberry32, seed "
        "<b id=\"quiz-seed-shown\">{0}</b>): the same seed replays the same sequence, so a rehearsal can be repeated; "
        "change the seed for the talk. Everyone votes, then the presenter reveals. The score counts the rounds the room "
        "voted on, for this session (reloading the page resets it).</p>\n"
        "<p><label>Mode <select id=\"quiz-mode\"><option value=\"abx\">A/B/X</option><option value=\"which\">which is which "
        "(3 to 5 variants)</option></select></label> <label>Seed <input id=\"quiz-seed\" type=\"number\" value=\"{0}\" "
        "style=\"width:7em\"></label> <label><input id=\"quiz-matched\" type=\"checkbox\"{1}{2}> play the loudness-matched "
        "copies (tests the sound, not the level)</label></p>\n",
        d.seed, matched ? " checked" : "", matched ? "" : " disabled");
    h += "<div id=\"quiz-abx\">\n<p><label>A <select id=\"quiz-a\">" + opts + "</select></label> <label>B <select id=\"quiz-b\">" +
         opts + "</select></label> <button id=\"quiz-new\">New round</button></p>\n";
    h += "<p class=\"players\"><span>A <audio id=\"quiz-audio-a\" controls preload=\"none\"></audio></span>"
         "<span>B <audio id=\"quiz-audio-b\" controls preload=\"none\"></audio></span>"
         "<span>X <audio id=\"quiz-audio-x\" controls preload=\"none\"></audio></span></p>\n"
         "<p><button id=\"quiz-vote-a\">Room says X = A</button><button id=\"quiz-vote-b\">Room says X = B</button>"
         "<button id=\"quiz-reveal\">Reveal</button></p>\n</div>\n";
    h += "<div id=\"quiz-which\" hidden>\n<p>Tick three to five variants, then shuffle: the samples are numbered in a seeded "
         "order; the room names each one.</p>\n<p id=\"quiz-pick\">";
    for (std::size_t i = 0; i < d.items.size(); ++i)
        h += fmt::format("<label><input type=\"checkbox\" value=\"{}\"{}> {}</label> ", i, i < std::min<std::size_t>(4, d.items.size()) ? " checked" : "",
                         html_escape(d.items[i].name));
    h += "</p>\n<p><button id=\"quiz-shuffle\">Shuffle</button><button id=\"quiz-which-reveal\">Reveal</button></p>\n"
         "<div id=\"quiz-samples\"></div>\n</div>\n";
    h += "<p id=\"quiz-status\"></p>\n<p id=\"quiz-answer\"></p>\n<p id=\"quiz-score\">Score: no rounds voted yet.</p>\n"
         "<p id=\"quiz-note\"></p>\n</section>\n";
    return h;
}

std::string slide_svg(const talk_data& d, std::size_t i)
{
    const auto& m = d.measures;
    if (m.size() != d.items.size() || i >= m.size()) return {};
    const std::size_t n = m.size();
    const std::size_t ref = partner_of(d, i);
    const double row = 30.0, top = 56.0;
    const double height = std::max(320.0, top + row * static_cast<double>(n) + 100.0);
    std::string s = fmt::format("<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 1000 {:.0f}\" font-family=\"sans-serif\" "
                                "role=\"img\" aria-label=\"levels and band spectrum of {}\">\n",
                                height, html_escape(d.items[i].name));
    // Left: every variant's level, this one large and orange, its comparison partner (B) ringed in blue.
    double lo = 0.0, hi = -400.0;
    for (const auto& x : m) lo = std::min(lo, x.rms_dbfs), hi = std::max(hi, x.rms_dbfs);
    lo = std::floor((lo - 3.0) / 10.0) * 10.0;
    hi = std::ceil((hi + 3.0) / 10.0) * 10.0;
    if (hi <= lo) hi = lo + 10.0;
    const double x0 = 270.0, x1 = 520.0;
    auto lx = [&](double v) { return x0 + (v - lo) / (hi - lo) * (x1 - x0); };
    s += fmt::format("<text x=\"{:.0f}\" y=\"26\" font-size=\"24\" text-anchor=\"middle\">level, dBFS RMS</text>\n", (x0 + x1) / 2);
    const double y_axis = top + row * static_cast<double>(n);
    for (double t = lo; t <= hi + 1e-9; t += 10.0)
        s += fmt::format("<line x1=\"{0:.1f}\" x2=\"{0:.1f}\" y1=\"{1:.0f}\" y2=\"{2:.0f}\" stroke=\"#ccc\"/><text x=\"{0:.1f}\" y=\"{3:.0f}\" "
                         "font-size=\"20\" text-anchor=\"middle\">{4:.0f}</text>\n",
                         lx(t), top - 14.0, y_axis, y_axis + 24.0, t);
    for (std::size_t k = 0; k < n; ++k) {
        const double y = top + row * (static_cast<double>(k) + 0.5);
        const bool me = k == i, partner = k == ref && k != i;
        s += fmt::format("<text x=\"{:.0f}\" y=\"{:.1f}\" font-size=\"{}\" text-anchor=\"end\"{}>{}</text>\n", x0 - 12.0, y + 6.0,
                         me ? 23 : 20, me ? " font-weight=\"bold\"" : "", html_escape(m[k].name));
        if (partner)
            s += fmt::format("<circle cx=\"{:.1f}\" cy=\"{:.1f}\" r=\"9\" fill=\"none\" stroke=\"{}\" stroke-width=\"3\"/>\n", lx(m[k].rms_dbfs), y,
                             ref_colour);
        else
            s += fmt::format("<circle cx=\"{:.1f}\" cy=\"{:.1f}\" r=\"{}\" fill=\"{}\"/>\n", lx(m[k].rms_dbfs), y, me ? 11 : 6,
                             me ? this_colour : "#888");
    }
    // Right: third-octave band levels of this variant (solid orange) and of B (dashed blue).
    const auto& a = m[i].band_db;
    const auto& b = m[ref].band_db;
    const std::size_t nb = std::min(a.size(), b.size());
    if (nb >= 2) {
        const double fx0 = 640.0, fx1 = 985.0, fy0 = top - 14.0, fy1 = y_axis;
        double peak = -400.0;
        for (std::size_t k = 0; k < nb; ++k) peak = std::max({peak, a[k], b[k]});
        const double ytop = std::ceil((peak + 2.0) / 10.0) * 10.0, ybot = ytop - 60.0;
        const double f_lo = std::log10(band_centre_hz(0)), f_hi = std::log10(band_centre_hz(nb - 1));
        auto fx = [&](std::size_t k) { return fx0 + (std::log10(band_centre_hz(k)) - f_lo) / (f_hi - f_lo) * (fx1 - fx0); };
        auto fy = [&](double v) { return fy0 + (ytop - std::clamp(v, ybot, ytop)) / (ytop - ybot) * (fy1 - fy0); };
        s += fmt::format("<text x=\"{:.0f}\" y=\"26\" font-size=\"24\" text-anchor=\"middle\">third-octave bands, dBFS</text>\n", (fx0 + fx1) / 2);
        for (double t = ybot; t <= ytop + 1e-9; t += 20.0)
            s += fmt::format("<line x1=\"{0:.0f}\" x2=\"{1:.0f}\" y1=\"{2:.1f}\" y2=\"{2:.1f}\" stroke=\"#ccc\"/><text x=\"{3:.0f}\" y=\"{4:.1f}\" "
                             "font-size=\"20\" text-anchor=\"end\">{5:.0f}</text>\n",
                             fx0, fx1, fy(t), fx0 - 6.0, fy(t) + 6.0, t);
        for (std::size_t k = 0; k < nb; ++k) {
            const double f = band_centre_hz(k);
            const char* lab = std::abs(f / 100.0 - 1.0) < 0.02 ? "100 Hz" : std::abs(f / 1000.0 - 1.0) < 0.02 ? "1 kHz" : std::abs(f / 5011.9 - 1.0) < 0.02 ? "5 kHz" : nullptr;
            if (lab)
                s += fmt::format("<text x=\"{:.1f}\" y=\"{:.0f}\" font-size=\"20\" text-anchor=\"middle\">{}</text>\n", fx(k), fy1 + 24.0, lab);
        }
        auto line = [&](const std::vector<double>& v, const char* colour, const char* extra) {
            std::string pts;
            for (std::size_t k = 0; k < nb; ++k) pts += fmt::format("{:.1f},{:.1f} ", fx(k), fy(v[k]));
            return fmt::format("<polyline points=\"{}\" fill=\"none\" stroke=\"{}\" stroke-width=\"4\"{}/>\n", pts, colour, extra);
        };
        if (ref != i) s += line(b, ref_colour, " stroke-dasharray=\"10 6\"");
        s += line(a, this_colour, "");
        // Legend: the line styles carry the meaning as well as the colours.
        const double ly = fy1 + 46.0;
        s += fmt::format("<line x1=\"{0:.0f}\" x2=\"{1:.0f}\" y1=\"{2:.0f}\" y2=\"{2:.0f}\" stroke=\"{3}\" stroke-width=\"4\"/>"
                         "<text x=\"{4:.0f}\" y=\"{5:.0f}\" font-size=\"20\">A: {6}</text>\n",
                         fx0, fx0 + 30.0, ly, this_colour, fx0 + 36.0, ly + 6.0, html_escape(m[i].name));
        if (ref != i)
            s += fmt::format("<line x1=\"{0:.0f}\" x2=\"{1:.0f}\" y1=\"{2:.0f}\" y2=\"{2:.0f}\" stroke=\"{3}\" stroke-width=\"4\" "
                             "stroke-dasharray=\"10 6\"/><text x=\"{4:.0f}\" y=\"{5:.0f}\" font-size=\"20\">B: {6}</text>\n",
                             fx0, fx0 + 30.0, ly + 28.0, ref_colour, fx0 + 36.0, ly + 34.0, html_escape(m[ref].name));
    }
    return s + "</svg>";
}

std::string presenter_html(const talk_data& d)
{
    const std::size_t n = d.items.size();
    std::string h = "<div id=\"presenter\" class=\"presenter\" hidden>\n";
    for (std::size_t i = 0; i < n; ++i) {
        const std::string summary = i < d.conclusions.summaries.size() ? d.conclusions.summaries[i] : std::string();
        h += fmt::format("<section class=\"slide\" id=\"slide-{0}\" data-i=\"{0}\" hidden>\n<div class=\"p-count\">{1} / {2}</div>\n"
                         "<h2 class=\"p-name\">{3}</h2>\n<p class=\"p-label\">{4}</p>\n<p class=\"p-summary\">{5}</p>\n"
                         "<div class=\"p-plot\">{6}</div>\n",
                         i, i + 1, n, html_escape(d.items[i].name), html_escape(d.items[i].label), html_escape(summary), slide_svg(d, i));
        h += "<div class=\"p-controls\"><button class=\"p-play\">&#9654; Play</button><button class=\"p-a on\">A</button>"
             "<button class=\"p-b\">B</button><span class=\"p-hearing\"></span></div>\n"
             "<p class=\"p-keys\">&larr; &rarr; previous / next &middot; space play / pause &middot; A / B switch at the same "
             "moment &middot; M level-consistent / loudness-matched &middot; Esc back to the page</p>\n</section>\n";
    }
    h += "<audio id=\"p-audio-a\" preload=\"auto\"></audio><audio id=\"p-audio-b\" preload=\"auto\"></audio>\n</div>\n";
    return h;
}

std::string talk_script(const talk_data& d)
{
    nlohmann::json j;
    j["seed"] = d.seed;
    j["partners"] = nlohmann::json::array();
    for (std::size_t i = 0; i < d.items.size(); ++i) j["partners"].push_back(partner_of(d, i));
    j["same_level_db"] = d.thresholds.same_level_db;
    j["spectral_jnd_db"] = d.thresholds.spectral_jnd_db;
    j["items"] = nlohmann::json::array();
    for (const auto& it : d.items) j["items"].push_back({{"name", it.name}, {"wav", it.wav}, {"matched", it.matched_wav}});
    // Pair figures for the quiz note: level difference (row minus column) and spectral distance, dB.
    nlohmann::json pairs = nlohmann::json::array();
    if (d.measures.size() == d.items.size())
        for (std::size_t a = 0; a < d.measures.size(); ++a) {
            nlohmann::json rowj = nlohmann::json::array();
            for (std::size_t b = 0; b < d.measures.size(); ++b) {
                const pair_verdict v = compare_for_listening(d.measures[a], d.measures[b], d.thresholds);
                rowj.push_back({{"level", std::round(v.level_db * 100.0) / 100.0},
                                {"spectral", std::isfinite(v.spectral_db) ? nlohmann::json(std::round(v.spectral_db * 100.0) / 100.0) : nlohmann::json()}});
            }
            pairs.push_back(rowj);
        }
    j["pairs"] = pairs;
    std::string data = j.dump();
    for (std::size_t at = data.find("</"); at != std::string::npos; at = data.find("</", at + 3)) data.replace(at, 2, "<\\/");
    return "<script>\nconst galenaTalkData = " + data + ";\n" + R"js(
(() => {
  'use strict';
  const D = galenaTalkData, n = D.items.length, $ = (id) => document.getElementById(id);
  // ---- presenter view ----
  const P = { open: false, i: 0, hearing: 'a', matched: false };
  const pa = $('p-audio-a'), pb = $('p-audio-b'), slides = Array.from(document.querySelectorAll('#presenter .slide'));
  const partner = (i) => D.partners[i];
  const src = (i, matched) => (matched && D.items[i].matched ? D.items[i].matched : D.items[i].wav);
  const active = () => (P.hearing === 'a' ? pa : pb);
  function setTime(el, t) {
    if (el.readyState >= 1) el.currentTime = t;
    else el.addEventListener('loadedmetadata', () => { el.currentTime = t; }, { once: true });
  }
  function label() {
    const s = slides[P.i];
    if (!s) return;
    s.querySelector('.p-a').classList.toggle('on', P.hearing === 'a');
    s.querySelector('.p-b').classList.toggle('on', P.hearing === 'b');
    s.querySelector('.p-play').innerHTML = active().paused ? '&#9654; Play' : '&#10074;&#10074; Pause';
    s.querySelector('.p-hearing').textContent = 'Hearing ' + P.hearing.toUpperCase() + ': ' +
      D.items[P.hearing === 'a' ? P.i : partner(P.i)].name + ' (B = ' + D.items[partner(P.i)].name + '), ' +
      (P.matched ? 'loudness-matched' : 'level-consistent');
  }
  function show(i) {
    P.i = ((i % n) + n) % n;
    slides.forEach((s, k) => { s.hidden = k !== P.i; });
    pa.pause(); pb.pause();
    pa.src = src(P.i, P.matched); pb.src = src(partner(P.i), P.matched);
    P.hearing = 'a';
    label();
  }
  function playPause() {
    const el = active();
    if (el.paused) el.play().catch(() => {}); else el.pause();
  }
  // A/B: the other player takes over at the same moment; playing stays playing, paused stays paused.
  function hear(which) {
    if (which === P.hearing) return;
    const from = active(), to = which === 'a' ? pa : pb;
    const t = from.currentTime, playing = !from.paused;
    from.pause();
    P.hearing = which;
    setTime(to, t);
    if (playing) to.play().catch(() => {});
    label();
  }
  function setMatched(on) {
    const t = active().currentTime, playing = !active().paused;
    P.matched = on;
    pa.pause(); pb.pause();
    pa.src = src(P.i, P.matched); pb.src = src(partner(P.i), P.matched);
    setTime(active(), t);
    if (playing) active().play().catch(() => {});
    label();
  }
  function openPresenter(i) {
    P.open = true;
    $('presenter').hidden = false;
    document.documentElement.style.overflow = 'hidden';  // no page scroll bar beside the slide
    show(i === undefined ? P.i : i);
  }
  function closePresenter() {
    P.open = false;
    pa.pause(); pb.pause();
    document.documentElement.style.overflow = '';
    $('presenter').hidden = true;
  }
  for (const el of [pa, pb]) for (const ev of ['play', 'pause', 'ended']) el.addEventListener(ev, label);
  // A clicked button gives its focus back: space must not press it again after the key handler ran.
  const click = (f) => (e) => { f(); e.currentTarget.blur(); };
  slides.forEach((s) => {
    s.querySelector('.p-play').addEventListener('click', click(playPause));
    s.querySelector('.p-a').addEventListener('click', click(() => hear('a')));
    s.querySelector('.p-b').addEventListener('click', click(() => hear('b')));
  });
  const opener = $('open-presenter');
  if (opener) opener.addEventListener('click', () => openPresenter(0));
  document.addEventListener('keydown', (e) => {
    if (e.target && (e.target.tagName === 'INPUT' || e.target.tagName === 'SELECT')) return;
    if (!P.open) {
      if (e.key === 'p' || e.key === 'P') { openPresenter(); e.preventDefault(); }
      return;
    }
    switch (e.key) {
      case 'ArrowRight': case 'ArrowDown': case 'PageDown': show(P.i + 1); break;
      case 'ArrowLeft': case 'ArrowUp': case 'PageUp': show(P.i - 1); break;
      case ' ': case 'Spacebar': playPause(); break;
      case 'a': case 'A': hear('a'); break;
      case 'b': case 'B': hear('b'); break;
      case 'm': case 'M': setMatched(!P.matched); break;
      case 'Escape': closePresenter(); break;
      default: return;
    }
    e.preventDefault();
  });

  // ---- blind test ----
  function mulberry32(seed) {
    let a = seed >>> 0;
    return () => {
      a = (a + 0x6D2B79F5) >>> 0;
      let t = a;
      t = Math.imul(t ^ (t >>> 15), t | 1);
      t ^= t + Math.imul(t ^ (t >>> 7), t | 61);
      return ((t ^ (t >>> 14)) >>> 0) / 4294967296;
    };
  }
  const Q = { rng: mulberry32(D.seed), round: 0, x: null, vote: null, revealed: true, right: 0, voted: 0, order: [], named: false };
  const qsrc = (i) => src(i, $('quiz-matched').checked);
  const qa = () => Number($('quiz-a').value), qb = () => Number($('quiz-b').value);
  function score() {
    $('quiz-score').textContent = Q.voted === 0 ? 'Score: no rounds voted yet.' :
      'Score: the room was right ' + Q.right + ' of ' + Q.voted + ' times (' + Math.round(100 * Q.right / Q.voted) + ' %; guessing averages 50 % in A/B/X).';
  }
  function pairNote(a, b) {
    const p = D.pairs.length ? D.pairs[a][b] : null;
    if (!p) return '';
    const A = D.items[a].name, B = D.items[b].name, L = Math.abs(p.level), S = p.spectral;
    const sameL = L < D.same_level_db, sameS = S !== null && S < D.spectral_jnd_db;
    const fig = A + ' and ' + B + ' differ by ' + L.toFixed(1) + ' dB in level and by ' +
      (S === null ? 'an unknown amount' : S.toFixed(1) + ' dB') + ' in tone colour (the largest third-octave band difference once the levels are matched). ';
    if (a === b) return 'A and B are the same variant: a control round; the room should score at chance.';
    if (sameL && sameS) return 'Honest note: ' + fig + 'Both are below what the ear resolves (' + D.same_level_db + ' dB in level, ' + D.spectral_jnd_db +
      ' dB per band in tone colour): expect the room to score near chance (50 %) over many rounds.';
    if (sameS) return 'Note: ' + fig + 'The tone colour differs by less than ' + D.spectral_jnd_db + ' dB per band: the level gives it away with the ' +
      'level-consistent files; with the loudness-matched copies expect chance.';
    return 'Note: ' + fig + 'The tone colour differs by ' + D.spectral_jnd_db + ' dB or more in some band: a careful listener may tell them apart even loudness-matched.';
  }
  function whichNote() {
    const chosen = picked(), close = [];
    for (let x = 0; x < chosen.length; ++x) for (let y = x + 1; y < chosen.length; ++y) {
      const p = D.pairs.length ? D.pairs[chosen[x]][chosen[y]] : null;
      if (p && Math.abs(p.level) < D.same_level_db && p.spectral !== null && p.spectral < D.spectral_jnd_db)
        close.push(D.items[chosen[x]].name + ' / ' + D.items[chosen[y]].name);
    }
    return close.length ? 'Honest note: these pairs differ by less than ' + D.same_level_db + ' dB in level and less than ' + D.spectral_jnd_db +
      ' dB per band in tone colour, below what the ear resolves; telling them apart is guesswork: ' + close.join('; ') + '.' : '';
  }
  function note() { $('quiz-note').textContent = $('quiz-mode').value === 'abx' ? pairNote(qa(), qb()) : whichNote(); }
  function newRound() {
    Q.round += 1; Q.x = Q.rng() < 0.5 ? 'A' : 'B'; Q.vote = null; Q.revealed = false;
    $('quiz-audio-a').src = qsrc(qa()); $('quiz-audio-b').src = qsrc(qb());
    $('quiz-audio-x').src = qsrc(Q.x === 'A' ? qa() : qb());
    $('quiz-answer').textContent = '';
    $('quiz-status').textContent = 'Round ' + Q.round + ': listen to A, B and X, then vote.';
    note();
  }
  function vote(v) {
    if (Q.revealed || Q.x === null) return;
    Q.vote = v;
    $('quiz-status').textContent = 'Round ' + Q.round + ': the room says X = ' + v + '. Reveal when ready.';
  }
  function reveal() {
    if (Q.revealed || Q.x === null) return;
    Q.revealed = true;
    const name = D.items[Q.x === 'A' ? qa() : qb()].name;
    let verdict = ' (no vote recorded: not scored)';
    if (Q.vote) { Q.voted += 1; if (Q.vote === Q.x) { Q.right += 1; verdict = ': the room was right.'; } else verdict = ': the room was wrong.'; }
    $('quiz-answer').textContent = 'X was ' + Q.x + ', ' + name + verdict;
    score();
  }
  function picked() { return Array.from(document.querySelectorAll('#quiz-pick input:checked')).map((e) => Number(e.value)); }
  function shuffle() {
    const chosen = picked();
    if (chosen.length < 3 || chosen.length > 5) { $('quiz-status').textContent = 'Tick three to five variants.'; return; }
    const o = chosen.slice();
    for (let k = o.length - 1; k > 0; --k) { const r = Math.floor(Q.rng() * (k + 1)); [o[k], o[r]] = [o[r], o[k]]; }
    Q.order = o; Q.named = false; Q.round += 1;
    const box = $('quiz-samples');
    box.textContent = '';
    o.forEach((v, k) => {
      const p = document.createElement('p');
      const au = document.createElement('audio'); au.controls = true; au.preload = 'none'; au.src = qsrc(v);
      const sel = document.createElement('select'); sel.className = 'quiz-guess';
      sel.add(new Option('?', ''));
      chosen.forEach((c) => sel.add(new Option(D.items[c].name, String(c))));
      const out = document.createElement('span'); out.className = 'quiz-truth';
      p.append('Sample ' + (k + 1) + ' ', au, ' is ', sel, ' ', out);
      box.append(p);
    });
    $('quiz-answer').textContent = '';
    $('quiz-status').textContent = 'Round ' + Q.round + ': ' + o.length + ' samples in a shuffled order; name each one, then reveal.';
    note();
  }
  function whichReveal() {
    if (!Q.order.length || Q.named) return;
    Q.named = true;
    let right = 0;
    const guesses = Array.from(document.querySelectorAll('#quiz-samples .quiz-guess'));
    const truths = Array.from(document.querySelectorAll('#quiz-samples .quiz-truth'));
    Q.order.forEach((v, k) => {
      const ok = guesses[k].value === String(v);
      if (ok) right += 1;
      truths[k].textContent = (ok ? 'right: ' : 'it was ') + D.items[v].name;
    });
    Q.voted += Q.order.length; Q.right += right;
    $('quiz-answer').textContent = right + ' of ' + Q.order.length + ' named correctly.';
    $('quiz-score').textContent = 'Score: ' + Q.right + ' of ' + Q.voted + ' answers right this session.';
  }
  $('quiz-b').value = n > 1 ? '1' : '0';
  $('quiz-new').addEventListener('click', newRound);
  $('quiz-vote-a').addEventListener('click', () => vote('A'));
  $('quiz-vote-b').addEventListener('click', () => vote('B'));
  $('quiz-reveal').addEventListener('click', reveal);
  $('quiz-shuffle').addEventListener('click', shuffle);
  $('quiz-which-reveal').addEventListener('click', whichReveal);
  for (const id of ['quiz-a', 'quiz-b']) $(id).addEventListener('change', () => { Q.x = null; Q.revealed = true; $('quiz-answer').textContent = ''; $('quiz-status').textContent = 'Press New round.'; note(); });
  $('quiz-pick').addEventListener('change', note);
  $('quiz-mode').addEventListener('change', () => {
    const abx = $('quiz-mode').value === 'abx';
    $('quiz-abx').hidden = !abx; $('quiz-which').hidden = abx;
    $('quiz-answer').textContent = ''; $('quiz-status').textContent = '';
    note();
  });
  $('quiz-seed').addEventListener('change', () => {
    const s = Math.max(0, Math.floor(Number($('quiz-seed').value) || 0));
    Q.rng = mulberry32(s); Q.round = 0; Q.x = null; Q.revealed = true;
    $('quiz-seed-shown').textContent = String(s);
    $('quiz-answer').textContent = ''; $('quiz-status').textContent = 'Seed ' + s + ': the sequence starts again.';
  });
  note();
  window.galenaTalk = { P, Q, pa, pb, show, hear, openPresenter, closePresenter, partner, newRound, vote, reveal };
})();
</script>
)js";
}

} // namespace galena::detail
