* RCCELL: a bare first-order RC "cell" for measurement tests, Y follows A through 1 kOhm.
* VDD and VSS are ports only so the cell fits charflow's testbench.
.subckt RCCELL A Y VDD VSS
R1 A Y 1k
.ends RCCELL
