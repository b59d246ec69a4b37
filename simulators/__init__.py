"""Simulators of joint, wrench sensor, operator, BLE peripheral and MES: an independent truth."""
