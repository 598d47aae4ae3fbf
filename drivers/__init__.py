"""Rig links and the wire protocol: the `Link` interface (`drivers.base`), the framed
codec (`drivers.wire`), the serial and MQTT links, and the C99 device-side codec
(`drivers/device_c/`). Imports neither `runtime` nor `sim_rigs`."""
