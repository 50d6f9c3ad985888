#include "textflag.h"

// func lineAt(a uintptr)
TEXT ·lineAt(SB), NOSPLIT|NOFRAME, $0-8
	MOVQ a+0(FP), AX
	PREFETCHT0 (AX)
	RET
