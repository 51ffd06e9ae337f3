#include <stdio.h>
int main(void) { puts("likeness"); return 0; }
