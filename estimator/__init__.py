"""Pure computation: constants, sphere geometry, response model, calibration, inverse, tracker."""
