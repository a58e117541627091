/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_peak_methods[] = {{NULL, NULL, 0, NULL}};
