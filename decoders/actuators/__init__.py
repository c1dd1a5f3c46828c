"""Actuator channels: decoders for the commands an engine computer sends to its actuators
(plugins in the entry-point group ``toothcomb.actuators``)."""
