"""The demo: an invented cold store whose thermistor probes drift, and the service watching them."""
