function mpc = fernholt6
%FERNHOLT6  Invented 6-bus, two-area test grid in MATPOWER case format (version 2).
%   Bus numbers are not contiguous on purpose; line 30-35-40 is series compensated (the
%   -0.04 pu capacitor section), 20-30 has no rating (rate_a 0), 30-50 is out of service,
%   the generator at bus 40 is out of service, and the slack's Pg (290) does not balance.

%% MATPOWER Case Format : Version 2
mpc.version = '2';

%%-----  Power Flow Data  -----%%
%% system MVA base
mpc.baseMVA = 100;

%% bus data
%	bus_i	type	Pd	Qd	Gs	Bs	area	Vm	Va	baseKV	zone	Vmax	Vmin
mpc.bus = [
	10	3	0	0	0	0	1	1.02	0	230	1	1.1	0.9;
	20	2	150	30	0	0	1	1.01	0	230	1	1.1	0.9;
	30	2	200	40	0	0	2	1	0	230	1	1.1	0.9;
	35	1	0	0	0	0	2	1	0	230	1	1.1	0.9;
	40	1	120	20	0	0	2	1	0	230	1	1.1	0.9;
	50	1	80	15	0	0	2	1	0	115	1	1.1	0.9;
];

%% generator data
%	bus	Pg	Qg	Qmax	Qmin	Vg	mBase	status	Pmax	Pmin
mpc.gen = [
	10	290	0	200	-100	1.02	100	1	400	50;
	20	200	0	150	-80	1.01	100	1	250	0;
	30	50	0	60	-30	1	100	1	100	10;   % peaking unit
	40	0	0	50	-50	1	100	0	90	0;
];

%% branch data
%	fbus	tbus	r	x	b	rateA	rateB	rateC	ratio	angle	status	angmin	angmax
mpc.branch = [
	10	20	0.01	0.06	0.03	300	300	300	0	0	1	-360	360;
	10	30	0.012	0.08	0.02	250	250	250	0	0	1	-360	360;
	20	30	0.008	0.05	0.01	0	0	0	0	0	1	-360	360;
	20	40	0.015	0.10	0.02	200	200	200	0	0	1	-360	360;
	30	35	0.01	0.12	0.02	200	200	200	0	0	1	-360	360;
	35	40	0	-0.04	0	200	200	200	0	0	1	-360	360;
	40	50	0.005	0.08	0	150	150	150	0.975	0	1	-360	360;
	30	50	0.02	0.20	0	100	100	100	0	0	0	-360	360;
];

%%-----  OPF Data  -----%%
%% generator cost data
%	2	startup	shutdown	n	c(n-1)	...	c0
mpc.gencost = [
	2	0	0	3	0.01	20	0;
	2	0	0	3	0.02	25	0;
	2	0	0	3	0.05	40	0;
	2	0	0	3	0.05	40	0;
];

mpc.bus_name = {
	'Fernholt North';
	'Fernholt South';
	'Quellbrook';
	'Quellbrook Cap';
	'Stannard';
	'Stannard 115';
};
