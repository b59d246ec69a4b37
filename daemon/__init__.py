"""The station daemon: the pure engine and planner, and the asyncio runtime around them."""
