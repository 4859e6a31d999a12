* CRAWL: Y follows A through 1 kOhm, beside a node driven at 13.7 THz into 10 pF. The
* simulator's truncation-error control must follow that node, so a transient takes
* femtosecond steps and runs for minutes: a stand-in for a simulation that hangs.
.subckt CRAWL A Y VDD VSS
R1 A Y 1k
Bs S VSS V = 0.5*sin(8.61e13*time)
Cs S VSS 10p
.ends CRAWL
