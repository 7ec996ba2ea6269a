"""Pure numerics over stored data: clock fit, liveness, calibration, export."""
