"""The virtual wrench as a real GATT server on bumble, and a bleak backend on bumble."""
