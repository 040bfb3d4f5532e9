"""The bundled demo envelope: an invented gantry crane (installed as schedule.demo_crane)."""
