/// The whole-receiver integrator: the linear network discretised exactly (matrix exponential with the
/// stations' carriers and the junction current integrated in closed form over each step), and the junction
/// solved implicitly per step by a safeguarded scalar Newton on its port. No frequency warping: a resonance
/// stays where the network puts it, whatever the step.
#pragma once

#include "galena/components.hpp"
#include "galena/network.hpp"
#include "galena/stations.hpp"

#include <Eigen/Core>
#include <array>
#include <complex>
#include <cstddef>
#include <span>
#include <vector>

namespace galena {

/// Settings of the RF integrator.
struct rf_settings {
    int steps_per_cycle = 32;        ///< N steps per reference-carrier cycle; even, [8, 4096]
    /// Newton stops, and a step closes on its prediction, when the estimate of the remaining junction-voltage
    /// error is below this, V; (0, 1e-3]. bench_receiver's coupled three-station set at N = 32 over 20 ms: at
    /// 1e-7 V, 2.5e-7 relRMS from the Newton to 1e-11 V (the discretisation's own error is 2.1e-3) with 98.9 %
    /// of the steps closed on the prediction; at 1e-8 V, 9e-8 relRMS and 96.8 % closed, in about the same time.
    double newton_tolerance_v = 1e-7;
    /// Close a step on the law linearised at its predicted voltage when Newton's own error estimate allows it
    /// (the default; see rf_integrator); false solves every step by the Newton, for checking the prediction.
    bool predict_steps = true;
};

/// What an added output is computed for.
enum class output_use {
    every_step, ///< its value at every step end (advance_cycle's `out`), its cycle mean and its peak
    cycle_mean, ///< its cycle mean only (and its value at the cycle's end): one row product per block instead of K
    phasors,    ///< its DFT at stations' carriers over each cycle only (add_phasor_output): 2 row products per station and block
};

/// Work counters.
struct rf_stats {
    std::size_t steps = 0;
    std::size_t predicted_steps = 0;   ///< steps closed on the law linearised at the extrapolated voltage (no Newton)
    std::size_t newton_iterations = 0; ///< law evaluations of the per-step Newton (the other steps' one batched evaluation not counted)
    std::size_t bisections = 0;
};

/// Steps  dx/dt = A x + B u(t) + b_j j(t)  over a uniform grid of N steps per cycle of a reference carrier.
///
/// The discretisation. Over a step [t0, t0 + h]:
///   - each station's EMF is Re(env(t) e^{jw t}) (env complex: I + jQ; real for AM) with env linear over the step (env sampled at reference-cycle
///     boundaries, 4-point Lagrange in between): its exact response is Re(e^{jw t0} (e0 W0 + e' W1)) with
///     W0 = int_0^h e^{A(h-s)} B e^{jws} ds and W1 = int_0^h e^{A(h-s)} B s e^{jws} ds, computed once per
///     station from one augmented matrix exponential. Carriers anywhere, on the grid or not, are exact.
///   - the junction current is linear over the step (j0 to j1): its response is g0 j0 + g1 j1, exact for
///     that polynomial (the phi-function form of an exponential integrator, Hochbruck & Ostermann 2010).
///   - x1 = e^{Ah} x0 + stations + g0 j0 + g1 j1; the port voltage v1 = c_p x1 + d_p u1 + d_pj j1.
/// The junction law closes the step: j1 = i(v1) + (3 q_r(v1) - 4 q_r(v0) + q_r(v-1)) / 2h, where q_r = q - C_lin v
/// is the part of the junction's charge that the network does not hold as the linear capacitor C_lin (the
/// second-order backward difference, BDF2, on that small remainder only: it is L-stable like backward Euler,
/// whose first-order error (the charge current half a step late) dominated the tuned sets from N = 64 up;
/// the trapezoidal charge form j1 = 2 dq_r/h - j0 + ... was tried and rings without bound against the exact
/// network: its (-1)^k mode is undamped and the exponential discretisation does not cancel it). One
/// monotone scalar equation in v1: Newton with a bisection fallback on a bracket, stopped when the quadratic
/// estimate of the remaining error is below the tolerance.
/// The discretisation error is second order: that of the junction current's piecewise-linear form and of
/// the BDF2 charge derivative. The remainder must have a positive slope (C(v) >= C_lin, see front_end.hpp):
/// an implicit rule on a negative remainder was measured unstable. The linear network, the tuned circuit's
/// resonance and every carrier are exact (the step exponentials are taken after balancing the matrix: a
/// tuned set's A has entries near 1e17 1/s beside a spectral radius near 6e11, and plain scaling-and-squaring
/// left them about 1.5e-7 off). In a tuned set the detector conducts for about 20 ns per 1 us cycle, less than
/// one step at N = 32: the piecewise-linear current then leaves the detected DC about 0.2-0.3 % high
/// (waveform relRMS 2.3e-3 to 3.0e-3 against ngspice; 6.1e-4 to 8.0e-4 at N = 64, 5.2e-5 to 1.05e-4 at
/// N = 256, tests/receiver_reference_test.cpp).
/// The junction solve. Each step's voltage is predicted from the same phase of the last three cycles: the
/// quadratic through them (3 v_c-1 - 3 v_c-2 + v_c-3; the sequence is the carrier's envelope and the beats
/// with the neighbours sampled once a cycle, smooth at 1 MHz), corrected by the change of the phase's free
/// voltage (the port voltage the network gives with the block's first current: exact, whatever the carriers)
/// from the same quadratic through its past values, times the phase's last dv/d(free voltage), 1 / (1 - beta J'):
/// a station far off the grid's carrier turns each phase's voltage by a large angle from cycle to cycle, which
/// no extrapolation of the phase's past follows, but it reaches the junction through the free voltage, which
/// the correction carries (near 1 where the junction is off, near 0 where it conducts and holds the voltage).
/// The law is evaluated at every prediction of a block in one vectorised loop, before the block's steps run.
/// A step then solves its linear relation v = alpha + beta J(v) with the law linearised there (no exp on the
/// chain from one step to the next), and is closed on that solution when Newton's own estimate of the
/// remaining error, |F''| dv^2 / (2 F') with dv the distance from the prediction (and F'' allowed to grow
/// over dv as an exponential's does), is within the tolerance and dv within a quarter of n Vt: the test that
/// stops the Newton, which then takes over (from that solution) for the steps that fail it. Measured at
/// N = 32: 99 % of bench_receiver's coupled three-station set's steps close at 1e-7 V (97 % without the
/// correction; about 65 % with the linear 2 v_c-1 - v_c-2 alone); rf_integrator_test's tapped set at 1e-8 V,
/// 88 % (81 % without), and 65 % with a strong station 19 % off tune (0 % without); bench_dial's glide, whose
/// grid sits at the band's top while the tuned carrier moves, 79 % (under 1 % without). Where the grid is
/// locked to another carrier than the one that dominates the junction, each phase aliases from cycle to cycle
/// and the conducting steps are not predicted: after a few cycles with few steps closed the closing rests
/// for a while and the Newton starts from the law linearised at the phase's last solution.
///
/// The evaluation (block superposition; the same numbers as stepping the recursion above, to rounding). A
/// cycle is cut into blocks of K = min(N, 32) steps. Within a block the recursion is linear in the block's
/// start state x_b, in the stations' envelope (a cubic in time over the cycle, written as its Taylor
/// coefficients P_q at the block start, times each station's carrier phasor there) and in the junction
/// currents j_0 .. j_K, so every output row r (the port, each added output, each state at the block end)
/// at local step k is
///     y_k = M_r[k] [x_b; Re(p P); Im(p P)] + sum_{i <= k} J_r[k][i] j_i
/// with M_r and J_r projected once (at construction, and at each retune) from state-level responses built
/// by recursion (Phi^k, Phi^d g0, Phi^d g1 and each station's source response). Per block: one small
/// matrix-vector product gives every step's free port voltage; per step only the scalar junction equation
/// remains, and each solved current is added to the later steps' free voltages (about K/2 multiply-adds in
/// whole vectors; a closed step's linear solution is written as an affine function of the previous step's
/// voltage, so one multiply-add stands between them); the outputs and the block's end state follow from two
/// more products. The block products run in one kernel built for the host's vector unit (block_product.hpp). No
/// per-step work grows with the number of stations, and none is O(n^2) in the number of states.
/// Not for networks without a junction port, or sources other than carriers with (complex) envelopes.
class rf_integrator {
public:
    /// @param ss        the network (input `input` is the EMF the stations drive)
    /// @param junction  the junction law at the port
    /// @param stations  the EMF; must outlive the integrator
    /// @param reference_hz the carrier the grid is locked to, Hz (> 0)
    /// Throws config_error on bad settings.
    rf_integrator(const state_space& ss, int input, const junction_law& junction, const station_source& stations,
                  double reference_hz, const rf_settings& settings);

    /// Starts from the zero state at t = 0 with a consistent junction.
    void initialize();
    /// Advances one reference cycle (N steps), calling `node_rows` outputs: writes the value of each
    /// requested output row at the N step ends into out (row-major, N values per row). Throws
    /// integration_error when the junction equation fails.
    void advance_cycle(std::span<double> out = {});
    /// Adds an output: a linear combination of the state, the EMF and the junction current (e.g. a node
    /// voltage: ss.node_c(n), ss.node_d(n)(input), ss.node_dj(n)). Returns its index. A cycle_mean output
    /// has no step values (its rows of advance_cycle's `out` are left as they were) and no peak (0): its
    /// tables are the block's step values summed with the trapezoidal weights, so its cost per block is one
    /// row product instead of K (the same mean to rounding).
    int add_output(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use = output_use::every_step);
    /// Adds an output measured only by its carrier phasors: after each cycle, output_phasor(k, s) is the sum over
    /// the cycle's step ends t_i of y(t_i) e^{-j w_s t_i} for the first `stations` stations (w_s a station's
    /// carrier, rad/s; t from the start, s), the same as a DFT of the step values (to rounding) without
    /// computing them: its tables are each block's rows summed with the carriers' rotations. No step values,
    /// mean or peak. Returns its index (in add_output's sequence). Throws config_error.
    int add_phasor_output(const Eigen::RowVectorXd& c, double d_u, double d_j, std::size_t stations);
    /// A phasor output's sum for station s over the last cycle, V (see add_phasor_output).
    [[nodiscard]] std::complex<double> output_phasor(int k, std::size_t s) const { return m_out_phasor.at(static_cast<std::size_t>(k)).at(s); }
    /// An output's row: value = c x + d_u u + d_j j (see add_output).
    struct output_row {
        Eigen::RowVectorXd c;
        double d_u = 0.0;
        double d_j = 0.0;
    };
    /// Replaces the network between two cycles by another with the same states (the same circuit with other
    /// element values: a tuning capacitor turned), continuing from state `x` of the new network (carry_charge
    /// maps the old state so that charges are conserved) with the junction, time, envelope and outputs'
    /// running values kept. `outputs` gives every added output's row in the new network, in add_output order.
    /// Re-tabulates everything (about one matrix exponential per station plus the block tables: measured in
    /// DEVELOPERS.md), so call it every many cycles, not every cycle. `steps_per_cycle` > 0 also moves the grid
    /// to that many steps per reference cycle (rf_settings' rules): the junction's charge history is carried
    /// to the new step (first order for one step) and the prediction starts afresh from the last solution, so
    /// the first three cycles after a change cost more Newton iterations. The reference-carrier phasors
    /// (start_phasors) are sums over steps: restart them after a change of grid. Throws config_error on a
    /// mismatch or a bad step count.
    void retune(const state_space& ss, int input, const Eigen::VectorXd& x, std::span<const output_row> outputs, int steps_per_cycle = 0);
    /// Mean of output k over the last cycle (trapezoidal rule over its N + 1 step values), V.
    [[nodiscard]] double output_mean(int k) const noexcept { return m_out_mean[static_cast<std::size_t>(k)]; }
    /// Largest |value| of output k at a step end since the last reset_peaks(), V.
    [[nodiscard]] double output_peak(int k) const noexcept { return m_out_peak[static_cast<std::size_t>(k)]; }
    void reset_peaks();
    /// Starts accumulating the reference-carrier phasors of the port voltage and junction current (from the
    /// next cycle on).
    void start_phasors();
    /// Sum over the accumulated steps of v e^{-j w_ref t} and j e^{-j w_ref t} (same weights): their ratio
    /// is the junction's effective admittance at the reference carrier, S.
    [[nodiscard]] std::complex<double> port_voltage_phasor() const noexcept { return m_v_phasor; }
    [[nodiscard]] std::complex<double> junction_current_phasor() const noexcept { return m_j_phasor; }
    [[nodiscard]] double time_s() const noexcept { return static_cast<double>(m_cycle) / m_fref; }
    [[nodiscard]] const Eigen::VectorXd& state() const noexcept { return m_x; }
    [[nodiscard]] double port_voltage_v() const noexcept { return m_v; }
    [[nodiscard]] double junction_current_a() const noexcept { return m_j; }
    [[nodiscard]] const rf_stats& stats() const noexcept { return m_stats; }
    [[nodiscard]] int steps_per_cycle() const noexcept { return m_n; }

private:
    /// Tables of one output row (c, d_u, d_j): M (K x m, m = n + 8 stations), J (K x (K + 1)), row k-1 for
    /// local step end k; see the class comment.
    struct row_tables {
        Eigen::MatrixXd m;
        Eigen::MatrixXd j; ///< column-major, as the block kernel reads it (block_product.hpp)
    };
    /// The responses over a block at the state level, from which every row's tables are projected (tabulate):
    /// Phi^k (k = 0..K), Phi^d g0 and Phi^d g1 (columns d = 0..K-1), and per station and Taylor power q
    /// (index 4 s + q) X_q,k, k = 0..K (columns; see set_network).
    struct block_responses {
        std::vector<Eigen::MatrixXd> phi_pow;
        Eigen::MatrixXd g0_pow, g1_pow;
        std::vector<Eigen::MatrixXcd> source;
    };
    /// Steps in the cycle's last block (K unless K does not divide N).
    [[nodiscard]] int last_block_steps() const noexcept { return m_n - (m_n - 1) / m_block * m_block; }
    /// Tables of the rows c (with d_u, d_j) at every local step end 1..length (c one row), or, with
    /// last_only, of every row of c at step end `length` only.
    /// Discretises `ss` (step exponentials, the stations' W0 and W1, the port and end-state tables).
    void set_network(const state_space& ss, int input);
    /// Sets the grid: N, the step, the blocks and everything per step or block that does not depend on the
    /// network (validates N).
    void set_grid(int steps_per_cycle);
    /// Forgets the per-phase history: every phase is predicted by the last solution until three cycles have run.
    void reset_history();
    [[nodiscard]] row_tables tabulate(const Eigen::MatrixXd& c, const Eigen::VectorXd& d_u, const Eigen::VectorXd& d_j,
                                      int length, bool last_only) const;
    /// An output's tables: tabulate's K rows for every_step; for cycle_mean three rows (J padded to K + 1
    /// columns): a whole block's step values summed, the cycle's last block summed with half weight on the
    /// cycle's end, and the value at the cycle's end (these three held transposed: one column each).
    [[nodiscard]] row_tables output_tables(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use, std::size_t stations) const;
    int add_any_output(const Eigen::RowVectorXd& c, double d_u, double d_j, output_use use, std::size_t stations);
    [[nodiscard]] std::complex<double> envelope_at_cycle(std::size_t station, long long c) const noexcept;
    template <bool Breakdown, bool Charge, bool SquareRoot>
    double solve_junction(double alpha, double beta, double v_guess, double& j1);
    template <bool Breakdown, bool Charge, bool SquareRoot>
    void run_cycle(std::span<double> out);

    const station_source* m_src;
    junction_law m_law;
    int m_n;     // steps per cycle
    int m_block; // steps per block, K
    double m_fref, m_h, m_tol;
    bool m_predict = true;
    bool m_charge;
    double m_c_lin;
    // Per step: e^{Ah}, g0, g1 and per station W0, W1 (see the class comment), kept for the tables.
    Eigen::MatrixXd m_phi;
    Eigen::VectorXd m_g0, m_g1;
    std::vector<Eigen::VectorXcd> m_w0, m_w1;
    std::vector<double> m_ratio;                              // carrier / reference
    std::vector<double> m_wh;                                 // carrier phase advance per step, w h, rad, per station
    std::vector<std::complex<double>> m_cycle_step_phasor;    // e^{j 2 pi ratio}: one cycle's rotation, per station
    std::vector<std::complex<double>> m_block_phasor;         // e^{j 2 pi ratio tau0} per station and block start
    std::vector<std::complex<double>> m_cycle_phasor;         // e^{j 2 pi ratio c} at cycle m_phasor_cycle's start, per station
    long long m_phasor_cycle = -1;
    block_responses m_resp;                                   // see block_responses
    row_tables m_port;                                        // the junction port's voltage
    std::vector<row_tables> m_outs;                           // the added outputs (a cycle_mean one: see output_tables)
    std::vector<output_use> m_out_use;
    std::vector<std::size_t> m_out_stations;                  // a phasor output's stations (0 otherwise)
    std::vector<std::vector<std::complex<double>>> m_out_phasor; // a phasor output's sums over the last cycle, per station
    std::vector<std::complex<double>> m_rot;                  // e^{j w_s t_b} at the current block's start, per station
    Eigen::VectorXd m_yp;                                     // a phasor output's block sums (real, imaginary per station)
    row_tables m_end, m_end_last;                             // the state after K steps and after the last block's steps
    std::vector<double> m_out_mean, m_out_peak, m_out_last;
    std::vector<std::complex<double>> m_ref_phasor;           // e^{-j 2 pi k / N}, k = 1..N
    /// The port voltage at each phase (step end) of the last three cycles: slot m_hist_last holds the last
    /// cycle's, the slots before it (mod 3) the older ones; m_hist_cycles of them are valid (0 to 3).
    std::vector<double> m_hist;
    std::vector<double> m_hist_free; ///< each phase's free port voltage (with the block's first current) in the same slots, V
    std::vector<double> m_sens;      ///< each phase's dv/d(free voltage) at its last linearisation (prediction or Newton; 0 after a reset)
    int m_hist_last = 0;
    int m_hist_cycles = 0;
    /// Cycles left before closing steps on the prediction is tried again (0: it is tried; see run_cycle).
    int m_closing_wait = 0;
    int m_low_cycles = 0; ///< closing cycles in a row with few steps closed (up to closing_low_cycles)
    /// The Newton's own start when the closing is off: the law as linearised at this phase's last Newton solution.
    struct phase_point {
        double v = 0.0;        ///< the port voltage, V
        double offset_a = 0.0; ///< i + 1.5 qr / h - (g + 1.5 cr / h) v: the linearised law at v = 0 before the step's known charge terms, A
        double inv_den = 1.0;  ///< 1 / (1 - beta (g + 1.5 cr / h)), the linearised step's gain
    };
    std::vector<phase_point> m_prev;
    /// The phase point of the Newton's last solution v (the law there: m_i0, m_g0_s, m_cr0_f, m_qr0), for a step
    /// whose port response to its own current is beta.
    [[nodiscard]] phase_point newton_phase_point(double v, double beta) const noexcept;
    /// One block's law linearised at the predicted voltages (index k - 1 for local step k; see run_cycle).
    struct block_law {
        std::vector<double> v_pred;  ///< the prediction, V
        std::vector<double> offset;  ///< J(v_pred) - J'(v_pred) v_pred without the step's charge history, A
        std::vector<double> slope;   ///< J'(v_pred), S
        std::vector<double> inv_den; ///< 1 / (1 - beta J'), the linear solve's gain
        std::vector<double> f2;      ///< |beta J''|: the step's F'' (F(v) = v - alpha - beta J(v)), 1/V
        std::vector<double> thr;     ///< 2 tol F': a step closes when dv^2 f2 <= thr, V
        std::vector<double> qa;      ///< the residual charge linearised, q_r(v) = qa + cr v: q_r(v_pred) - cr v_pred, C
        std::vector<double> cr;      ///< its slope C(v_pred) - C_lin, F
    };
    block_law m_bl;
    Eigen::VectorXd m_x;
    Eigen::VectorXd m_z;           // block input [x_b; Re(p P); Im(p P)]
    Eigen::VectorXd m_jb;          // junction currents j_0 .. j_K of the block, A
    Eigen::VectorXd m_free;        // free port voltage of the block's steps, V
    Eigen::VectorXd m_y;           // an output over the block's steps
    double m_v = 0.0, m_j = 0.0, m_qr0 = 0.0; // the last solution: port voltage, V; junction current, A; residual charge, C
    double m_i0 = 0.0, m_g0_s = 0.0, m_cr0_f = 0.0; // the law at the Newton's last solution: current, A; conductance, S; C - C_lin, F
    double m_qr1 = 0.0; // the residual charge one step before m_qr0 (BDF2's second point), C
    /// BDF2's known part of h dq_r/dt at the step end: 2 q_r(v0) - q_r(v-1) / 2, C.
    [[nodiscard]] double charge_history() const noexcept { return 2.0 * m_qr0 - 0.5 * m_qr1; }
    std::size_t m_cycle = 0;
    // Envelope samples at cycles m_env_cycle - 1 .. m_env_cycle + 2, 4 per station (each sample is used by four
    // consecutive cycles: one new sample per station per cycle).
    std::vector<std::complex<double>> m_env;
    std::vector<std::complex<double>> m_cubic; // per station, the envelope's cubic over the current cycle (run_cycle)
    long long m_env_cycle = 0;
    bool m_env_valid = false;
    bool m_phasors = false;
    std::complex<double> m_v_phasor{}, m_j_phasor{};
    rf_stats m_stats;
};

} // namespace galena
