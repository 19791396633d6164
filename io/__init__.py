"""Every boundary: wire format, serial link, capture, CSV and config files, sinks, command line."""
