// Package calibration fits and applies curves that map a prototype's ratio of
// ratios R to SpO2, and scores them the way accuracy standards do (Arms, bias,
// precision, Bland-Altman limits of agreement). It is pure: no I/O beyond
// reading and writing the files it is handed.
package calibration
