#include "galena/stations.hpp"

#include "galena/validate.hpp"

namespace galena {

const station_params& station_params::validate() const
{
    detail::require_range("station.carrier_hz", carrier_hz, 1e4, 1e8, "Hz");
    detail::require_above("station.field_v_per_m", field_v_per_m, 0.0, 100.0, "V/m");
    detail::require_range("station.modulation_index", modulation_index, 0.0, 1.0);
    return *this;
}

} // namespace galena
