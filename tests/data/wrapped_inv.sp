* An inverter netlist as a layout extractor might write it: X instances of the kit's device
* wrappers, pins in an unusual order, a continuation line.
.subckt WINV VSS Y
+ A VDD
xp Y A VDD VDD pfet w=0.8e-6 l=0.1e-6
xn Y A VSS VSS nfet w=0.4e-6 l=0.1e-6
.ends WINV
