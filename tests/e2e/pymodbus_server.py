"""An independent Modbus TCP transmitter written with Debian's python3-pymodbus
(3.0), to check that our probe driver reads someone else's server: mixed
tables, word orders, scaled integers. Usage: pymodbus_server.py PORT"""
import struct
import sys

from pymodbus.datastore import (ModbusSequentialDataBlock, ModbusServerContext,
                                ModbusSlaveContext)
from pymodbus.server import StartTcpServer


def float_words(v, order):
    hi, lo = struct.unpack(">HH", struct.pack(">f", v))
    return [hi, lo] if order == "big" else [lo, hi]


def main():
    port = int(sys.argv[1])
    hr = [0] * 1200
    ir = [0] * 64
    hr[100:102] = float_words(-123.25, "little")   # mV, float32, little word order
    hr[110] = 253                                   # temperature, int16, 0.1 degC
    hr[1000] = struct.unpack(">H", struct.pack(">h", -40))[0]  # int16 -40 (far away)
    ir[5] = 712                                     # pH, uint16, 0.01 pH
    ir[30] = 0x0002                                 # status word: bit 1 set
    ir[40:42] = list(struct.unpack(">HH", struct.pack(">i", -250000)))  # int32 big: uV
    store = ModbusSlaveContext(hr=ModbusSequentialDataBlock(0, hr),
                               ir=ModbusSequentialDataBlock(0, ir), zero_mode=True)
    ctx = ModbusServerContext(slaves={7: store}, single=False)
    StartTcpServer(context=ctx, address=("127.0.0.1", port))


if __name__ == "__main__":
    main()
