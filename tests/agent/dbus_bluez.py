"""
A mocked bluetoothd on a private D-Bus: the radio edge for tests of the real bleak source.

``dbus-daemon`` runs with a private config on a socket in the test's directory and
``DBUS_SYSTEM_BUS_ADDRESS`` points at it; Debian's ``python3-dbusmock`` (run by ``/usr/bin/python3``,
so the project's venv needs no dbus-python) owns ``org.bluez`` with its ``bluez5`` template. Each is
started and stopped by PID with bounded waits. The test drives the mock through its D-Bus methods
with dbus-fast (bleak's own D-Bus library), so the bytes a test injects travel the same path as
bluetoothd's signals on a board.

Where the template falls short of bluetoothd (python3-dbusmock 0.28, templates/bluez5.py):

* the adapter has no ``Roles`` property (bleak reads it to pick a default adapter): added here;
* ``AddDevice`` declares ``ManufacturerData``/``ServiceData`` with the wrong D-Bus types, so devices
  are created with ``AddObject`` and announced with an ``InterfacesAdded`` emitted here;
* passive scanning needs ``AdvertisementMonitorManager1``: `add_monitor_manager` adds its methods.

One ``PropertiesChanged`` carrying RSSI and the advertising data is one advert, as bluetoothd sends it.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import shutil
import signal
import subprocess
import tempfile
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import pytest
from dbus_fast import Message, MessageType, Variant
from dbus_fast.aio import MessageBus

from tests.conftest import require_tool

MOCK_PYTHON = "/usr/bin/python3"
BLUEZ = "org.bluez"
MOCK_IFACE = "org.freedesktop.DBus.Mock"
BLUEZ_MOCK_IFACE = "org.bluez.Mock"
ADAPTER_IFACE = "org.bluez.Adapter1"
DEVICE_IFACE = "org.bluez.Device1"
MONITOR_MANAGER_IFACE = "org.bluez.AdvertisementMonitorManager1"
PROPS_IFACE = "org.freedesktop.DBus.Properties"
OM_IFACE = "org.freedesktop.DBus.ObjectManager"

START_TIMEOUT_S = 20.0
"""Bound on every wait for a process to come up or go away (generous: 2 shared cores)."""

_BUS_CONFIG = """<!DOCTYPE busconfig PUBLIC "-//freedesktop//DTD D-BUS Bus Configuration 1.0//EN"
 "http://www.freedesktop.org/standards/dbus/1.0/busconfig.dtd">
<busconfig>
  <type>system</type>
  <listen>unix:path={socket}</listen>
  <auth>EXTERNAL</auth>
  <policy context="default">
    <allow user="*"/>
    <allow own="*"/>
    <allow send_type="method_call"/>
    <allow send_destination="*" eavesdrop="true"/>
    <allow receive_sender="*"/>
    <allow eavesdrop="true"/>
  </policy>
</busconfig>
"""


def require_mock_tools() -> None:
    """Skip (or fail under LISTENPOST_REQUIRE_TOOLS=1) without dbus-daemon or Debian's python3-dbusmock."""
    require_tool("dbus-daemon")
    ok = shutil.which(MOCK_PYTHON) and (
        subprocess.run(
            [MOCK_PYTHON, "-c", "import dbusmock"], capture_output=True, timeout=START_TIMEOUT_S
        ).returncode
        == 0
    )
    if not ok:
        if os.environ.get("LISTENPOST_REQUIRE_TOOLS") == "1":
            pytest.fail("python3-dbusmock is not installed and LISTENPOST_REQUIRE_TOOLS=1")
        pytest.skip("python3-dbusmock is not installed (apt-get install python3-dbusmock)")


def _spawn(argv: list[str], log_path: Path, env: dict[str, str]) -> subprocess.Popen[bytes]:
    with open(log_path, "ab") as err:  # the child keeps its own copy of the descriptor
        return subprocess.Popen(argv, env=env, stdout=subprocess.DEVNULL, stderr=err)


def _stop(proc: subprocess.Popen[bytes] | None, sig: int = signal.SIGTERM) -> None:
    """Stop one process we started, by its PID, within the bound."""
    if proc is None or proc.poll() is not None:
        return
    os.kill(proc.pid, sig)
    try:
        proc.wait(timeout=START_TIMEOUT_S)
    except subprocess.TimeoutExpired:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=START_TIMEOUT_S)


def v(sig: str, value: Any) -> Variant:
    return Variant(sig, value)


class MockBluez:
    """
    One private system bus and one mocked bluetoothd on it, with the calls tests need.

    ``address`` stays the same across `restart_bus`, as a restarted system bus keeps its socket.
    """

    def __init__(self, tmp: Path) -> None:
        self.tmp = tmp
        # a unix socket path must fit in 108 bytes; pytest's tmp_path may not
        self._sockdir = Path(tempfile.mkdtemp(prefix="lpbus-"))
        self.socket = self._sockdir / "system_bus_socket"
        self.address = f"unix:path={self.socket}"
        self.config = tmp / "bus.conf"
        self.config.write_text(_BUS_CONFIG.format(socket=self.socket))
        self.bus_proc: subprocess.Popen[bytes] | None = None
        self.bluez_proc: subprocess.Popen[bytes] | None = None
        self.client: MessageBus | None = None
        self.starts = 0

    # -- processes

    async def start_bus(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.socket.unlink()
        self.bus_proc = _spawn(
            ["dbus-daemon", f"--config-file={self.config}", "--nofork", "--nopidfile", "--nosyslog"],
            self.tmp / "dbus-daemon.log",
            dict(os.environ),
        )
        deadline = time.monotonic() + START_TIMEOUT_S
        while True:
            try:
                self.client = await MessageBus(bus_address=self.address).connect()
                return
            except OSError:
                if time.monotonic() > deadline or self.bus_proc.poll() is not None:
                    raise RuntimeError(f"dbus-daemon did not listen on {self.address}") from None
                await asyncio.sleep(0.02)

    async def start_bluez(self, *, adapter: str | None = "hci0") -> None:
        """Start the mock (its own process) and wait until it owns org.bluez; add the adapter."""
        assert self.client is not None
        self.starts += 1
        env = dict(os.environ, DBUS_SYSTEM_BUS_ADDRESS=self.address)
        self.bluez_proc = _spawn(
            [MOCK_PYTHON, "-m", "dbusmock", "--system", "--template", "bluez5"],
            self.tmp / f"bluez-{self.starts}.log",
            env,
        )
        # the mock prints nothing when ready: poll the bus for the name
        deadline = time.monotonic() + START_TIMEOUT_S
        while not await self.name_has_owner(BLUEZ):
            if time.monotonic() > deadline or self.bluez_proc.poll() is not None:
                raise RuntimeError("the mocked bluetoothd did not take org.bluez")
            await asyncio.sleep(0.02)
        if adapter:
            await self.add_adapter(adapter)

    def kill_bluez(self) -> None:
        _stop(self.bluez_proc, signal.SIGKILL)  # as a crash: no InterfacesRemoved first

    def kill_bus(self) -> None:
        """dbus-daemon dies first (everyone's connection drops at once), then the mock with it."""
        _stop(self.bus_proc, signal.SIGKILL)
        _stop(self.bluez_proc, signal.SIGKILL)
        if self.client is not None:
            self.client.disconnect()
        self.client = None

    async def close(self) -> None:
        if self.client is not None:
            self.client.disconnect()
            with contextlib.suppress(Exception):
                await asyncio.wait_for(self.client.wait_for_disconnect(), START_TIMEOUT_S)
            self.client = None
        _stop(self.bluez_proc)
        _stop(self.bus_proc)
        shutil.rmtree(self._sockdir, ignore_errors=True)

    # -- D-Bus calls

    async def call(
        self,
        path: str,
        interface: str,
        member: str,
        signature: str = "",
        body: list[Any] | None = None,
        destination: str = BLUEZ,
    ) -> list[Any]:
        assert self.client is not None
        reply = await asyncio.wait_for(
            self.client.call(
                Message(
                    destination=destination,
                    path=path,
                    interface=interface,
                    member=member,
                    signature=signature,
                    body=body or [],
                )
            ),
            START_TIMEOUT_S,
        )
        assert reply is not None
        if reply.message_type is MessageType.ERROR:
            raise RuntimeError(f"{member}: {reply.error_name}: {reply.body}")
        return list(reply.body)

    async def name_has_owner(self, name: str) -> bool:
        (has,) = await self.call(
            "/org/freedesktop/DBus",
            "org.freedesktop.DBus",
            "NameHasOwner",
            "s",
            [name],
            destination="org.freedesktop.DBus",
        )
        return bool(has)

    async def add_adapter(self, name: str = "hci0") -> str:
        (path,) = await self.call("/", BLUEZ_MOCK_IFACE, "AddAdapter", "ss", [name, "listenpost-test"])
        # bluetoothd has Roles; the template does not (bleak reads it to choose a default adapter)
        await self.call(
            path, MOCK_IFACE, "AddProperty", "ssv", [ADAPTER_IFACE, "Roles", v("as", ["central"])]
        )
        return str(path)

    async def remove_adapter(self, name: str = "hci0") -> None:
        await self.call("/", BLUEZ_MOCK_IFACE, "RemoveAdapterWithDevices", "s", [name])

    async def add_monitor_manager(self, adapter: str = "hci0") -> None:
        """The methods passive scanning calls (the template has none)."""
        for method in ("RegisterMonitor", "UnregisterMonitor"):
            await self.call(
                f"/org/bluez/{adapter}",
                MOCK_IFACE,
                "AddMethod",
                "sssss",
                [MONITOR_MANAGER_IFACE, method, "o", "", ""],
            )

    async def set_discovering(self, value: bool, adapter: str = "hci0") -> None:
        """Change ``Discovering`` behind the scanner's back, signalled as bluetoothd does."""
        await self.call(
            f"/org/bluez/{adapter}",
            MOCK_IFACE,
            "UpdateProperties",
            "sa{sv}",
            [ADAPTER_IFACE, {"Discovering": v("b", value)}],
        )

    async def method_calls(self, member: str, adapter: str = "hci0") -> list[list[Any]]:
        """Arguments of each call of ``member`` on the adapter, as the mock logged them (oldest first)."""
        (calls,) = await self.call(f"/org/bluez/{adapter}", MOCK_IFACE, "GetMethodCalls", "s", [member])
        return [[unvariant(a) for a in args] for _t, args in calls]

    async def all_calls(self, adapter: str = "hci0") -> list[str]:
        (calls,) = await self.call(f"/org/bluez/{adapter}", MOCK_IFACE, "GetCalls")
        return [name for _t, name, _args in calls]

    async def add_device(self, address: str, adapter: str = "hci0", *, address_type: str = "random") -> str:
        """A device object with correctly typed advertising data, announced by InterfacesAdded (no RSSI yet)."""
        path = f"/org/bluez/{adapter}/dev_{address.replace(':', '_').upper()}"
        props = {
            "Address": v("s", address),
            "AddressType": v("s", address_type),
            "Adapter": v("o", f"/org/bluez/{adapter}"),
            "Alias": v("s", address.replace(":", "-")),
            "Paired": v("b", False),
            "Connected": v("b", False),
            "Trusted": v("b", False),
            "Blocked": v("b", False),
            "UUIDs": v("as", []),
            "ManufacturerData": v("a{qv}", {}),
            "ServiceData": v("a{sv}", {}),
        }
        await self.call("/", MOCK_IFACE, "AddObject", "ssa{sv}a(ssss)", [path, DEVICE_IFACE, props, []])
        await self.call(
            "/",
            MOCK_IFACE,
            "EmitSignal",
            "sssav",
            [
                OM_IFACE,
                "InterfacesAdded",
                "oa{sa{sv}}",
                [v("o", path), v("a{sa{sv}}", {DEVICE_IFACE: props})],
            ],
        )
        return path

    async def advert(
        self,
        path: str,
        rssi: int,
        *,
        mfg: Mapping[int, bytes] | None = None,
        service_data: Mapping[str, bytes] | None = None,
        tx_power: int | None = None,
    ) -> None:
        """One advertisement heard: one PropertiesChanged with RSSI and the data, as bluetoothd sends it."""
        changed: dict[str, Variant] = {"RSSI": v("n", rssi)}
        if mfg is not None:
            changed["ManufacturerData"] = v("a{qv}", {k: v("ay", bytes(b)) for k, b in mfg.items()})
        if service_data is not None:
            changed["ServiceData"] = v("a{sv}", {k: v("ay", bytes(b)) for k, b in service_data.items()})
        if tx_power is not None:
            changed["TxPower"] = v("n", tx_power)
        await self.call(
            path,
            MOCK_IFACE,
            "EmitSignal",
            "sssav",
            [
                PROPS_IFACE,
                "PropertiesChanged",
                "sa{sv}as",
                [v("s", DEVICE_IFACE), v("a{sv}", changed), v("as", [])],
            ],
        )


def unvariant(x: Any) -> Any:
    """Plain Python values out of nested dbus-fast Variants."""
    if isinstance(x, Variant):
        return unvariant(x.value)
    if isinstance(x, dict):
        return {k: unvariant(val) for k, val in x.items()}
    if isinstance(x, list):
        return [unvariant(i) for i in x]
    return x
