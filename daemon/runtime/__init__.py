"""The asyncio runtime: BLE links, MQTT, the durable outbox, cues, configuration."""
