// A tiny program built against the installed galena package: the germanium preset's zero-bias video
// resistance must equal n Vt / Is computed here from the exact SI constants.
#include <galena/components.hpp>
#include <galena/constants.hpp>

#include <cmath>
#include <cstdio>

int main()
{
    const auto& p = galena::find_diode_preset("germanium-point-contact").params;
    const double vt = 1.380649e-23 * (p.temperature_c + 273.15) / 1.602176634e-19;
    const double expected = p.emission_coefficient * vt / p.saturation_current_a;
    const double got = p.video_resistance_ohm();
    std::printf("video resistance %.6g ohm (expected %.6g)\n", got, expected);
    return std::fabs(got / expected - 1.0) < 1e-12 ? 0 : 1;
}
